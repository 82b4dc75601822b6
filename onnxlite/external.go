package onnxlite

import (
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
)

// loadExternal reads the payload of a tensor stored with
// data_location=EXTERNAL. The external_data entries are "location" (a path
// relative to the model's directory), "offset" and "length" in bytes
// (optional; offset defaults to 0 and length to the rest of the file), and
// "checksum", which is ignored. The file must be a regular file (checked
// before it is opened) inside d.baseDir after resolving symlinks on both
// sides; the offset and length are checked against
// the file size before anything is read, and the length must be want, the
// byte size the dims and element type call for.
func (d *decoder) loadExternal(path string, entries [][2]string, want int64) ([]byte, error) {
	fail := func(format string, args ...any) error {
		return fmt.Errorf("%s: %s: %w", path, fmt.Sprintf(format, args...), ErrExternalData)
	}
	var loc string
	offset, length := int64(0), int64(-1)
	for _, kv := range entries {
		switch kv[0] {
		case "location":
			loc = kv[1]
		case "offset", "length":
			v, err := strconv.ParseInt(kv[1], 10, 64)
			if err != nil || v < 0 {
				return nil, fail("external_data %s %q is not a non-negative integer", kv[0], kv[1])
			}
			if kv[0] == "offset" {
				offset = v
			} else {
				length = v
			}
		}
	}
	if d.baseDir == "" {
		return nil, fail("external data file %q needs a base directory (decode from a file, or set DecodeOptions.BaseDir)", loc)
	}
	if loc == "" {
		return nil, fail("external_data has no location")
	}
	if filepath.IsAbs(loc) || strings.HasPrefix(loc, "/") || strings.HasPrefix(loc, `\`) || filepath.VolumeName(loc) != "" {
		return nil, fail("external data location %q is absolute; it must be relative to the model's directory", loc)
	}
	for _, part := range strings.FieldsFunc(loc, func(r rune) bool { return r == '/' || r == '\\' }) {
		if part == ".." {
			return nil, fail("external data location %q has a \"..\" component", loc)
		}
	}
	base, err := filepath.EvalSymlinks(d.baseDir)
	if err != nil {
		return nil, fail("base directory: %v", err)
	}
	if base, err = filepath.Abs(base); err != nil {
		return nil, fail("base directory: %v", err)
	}
	target, err := filepath.EvalSymlinks(filepath.Join(d.baseDir, filepath.FromSlash(loc)))
	if err != nil {
		return nil, fail("external data file %q: %v", loc, err)
	}
	if target, err = filepath.Abs(target); err != nil {
		return nil, fail("external data file %q: %v", loc, err)
	}
	rel, err := filepath.Rel(base, target)
	if err != nil || rel == ".." || strings.HasPrefix(rel, ".."+string(filepath.Separator)) || filepath.IsAbs(rel) {
		return nil, fail("external data file %q resolves to %s, outside the model directory %s", loc, target, base)
	}
	// Opening a FIFO blocks until a writer comes, and a device may never
	// end: anything but a regular file is refused before it is opened, and
	// opened without blocking in case it was replaced in between.
	if st, err := os.Stat(target); err != nil {
		return nil, fail("external data file %q: %v", loc, err)
	} else if !st.Mode().IsRegular() {
		return nil, fail("external data file %q is not a regular file", loc)
	}
	f, err := openNonBlocking(target)
	if err != nil {
		return nil, fail("external data file %q: %v", loc, err)
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return nil, fail("external data file %q: %v", loc, err)
	}
	if !st.Mode().IsRegular() {
		return nil, fail("external data file %q is not a regular file", loc)
	}
	size := st.Size()
	if offset > size {
		return nil, fail("external data file %q: offset %d is past the end of the file (%d bytes)", loc, offset, size)
	}
	if length < 0 {
		length = size - offset
	}
	if length > size-offset {
		return nil, fail("external data file %q: offset %d + length %d is past the end of the file (%d bytes)", loc, offset, length, size)
	}
	if length != want {
		return nil, fail("external data file %q: length %d bytes, the tensor's dims and type need %d", loc, length, want)
	}
	buf := make([]byte, length)
	if _, err := f.ReadAt(buf, offset); err != nil && !(err == io.EOF && length == 0) {
		return nil, fail("external data file %q: %v", loc, err)
	}
	return buf, nil
}
