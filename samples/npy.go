package samples

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"

	"codeberg.org/sbinet/npyio/npy"
)

// The .npy format (NEP 1, "A Simple File Format for NumPy Arrays"; the
// reader of numpy.lib.format in Debian python3-numpy 1.24.2): the magic
// string, a major and a minor version byte (1.0, 2.0 or 3.0), the length of
// the header (a little-endian uint16 in version 1.0, uint32 after), the
// header, a Python dict literal such as
//
//	{'descr': '<f4', 'fortran_order': False, 'shape': (3, 8), }
//
// padded with spaces and ended by a newline, and then the data.
const (
	npyMagic = "\x93NUMPY"
	// npyMaxHeader is NumPy's own limit on the header's length
	// (numpy.lib.format._MAX_HEADER_SIZE = 10000, python3-numpy 1.24.2).
	npyMaxHeader = 10000
	// npyMaxRank is NumPy's largest rank (NPY_MAXDIMS = 32,
	// numpy/core/include/numpy/ndarraytypes.h, python3-numpy 1.24.2).
	npyMaxRank = 32
)

// npyHeader is a .npy header, checked.
type npyHeader struct {
	descr   string // as written: <f4
	size    int    // bytes per element
	fortran bool
	shape   []int
	count   int // elements, ∏shape
}

// npyDtypes are the element types read, by kind and size: the real,
// integer and boolean types NumPy writes.
var npyDtypes = map[string]bool{
	"f4": true, "f8": true,
	"i1": true, "i2": true, "i4": true, "i8": true,
	"u1": true, "u2": true, "u4": true, "u8": true,
	"b1": true,
}

// readNPYHeader reads and checks the header of a .npy file: its magic,
// version, length, keys, element type and shape, and that the number of
// bytes of data the shape calls for fits an int. Nothing is handed to the
// .npy library before this.
func readNPYHeader(r io.Reader) (*npyHeader, error) {
	var pre [8]byte
	if n, err := io.ReadFull(r, pre[:]); err != nil {
		if n == 0 {
			return nil, fmt.Errorf("not a .npy file: expected the magic string \\x93NUMPY, got an empty file")
		}
		if !bytes.HasPrefix([]byte(npyMagic), pre[:min(n, 6)]) {
			return nil, fmt.Errorf("not a .npy file: expected the magic string \\x93NUMPY, got %q", pre[:n])
		}
		return nil, fmt.Errorf(".npy file ends after %d bytes, inside its preamble (10 or 12 bytes)", n)
	}
	if string(pre[:6]) != npyMagic {
		return nil, fmt.Errorf("not a .npy file: expected the magic string \\x93NUMPY, got %q", pre[:6])
	}
	major, minor := pre[6], pre[7]
	var hlen int
	switch {
	case major == 1 && minor == 0:
		var b [2]byte
		if _, err := io.ReadFull(r, b[:]); err != nil {
			return nil, fmt.Errorf(".npy file ends inside its header length")
		}
		hlen = int(binary.LittleEndian.Uint16(b[:]))
	case (major == 2 || major == 3) && minor == 0:
		var b [4]byte
		if _, err := io.ReadFull(r, b[:]); err != nil {
			return nil, fmt.Errorf(".npy file ends inside its header length")
		}
		if v := binary.LittleEndian.Uint32(b[:]); v > npyMaxHeader {
			return nil, fmt.Errorf(".npy header of %d bytes is longer than the %d bytes NumPy reads", v, npyMaxHeader)
		} else {
			hlen = int(v)
		}
	default:
		return nil, fmt.Errorf(".npy format version %d.%d: expected 1.0, 2.0 or 3.0", major, minor)
	}
	if hlen > npyMaxHeader {
		return nil, fmt.Errorf(".npy header of %d bytes is longer than the %d bytes NumPy reads", hlen, npyMaxHeader)
	}
	text := make([]byte, hlen)
	if n, err := io.ReadFull(r, text); err != nil {
		return nil, fmt.Errorf(".npy file ends inside its header: expected %d bytes, got %d", hlen, n)
	}
	return parseNPYHeader(string(text))
}

// parseNPYHeader reads the header's dict literal: the keys descr,
// fortran_order and shape, each once, in any order.
func parseNPYHeader(text string) (*npyHeader, error) {
	p := &pyLiteral{s: text}
	fields, err := p.dict()
	if err != nil {
		return nil, fmt.Errorf(".npy header %s: %w", quoteHeader(text), err)
	}
	h := &npyHeader{}
	for _, key := range []string{"descr", "fortran_order", "shape"} {
		if _, ok := fields[key]; !ok {
			return nil, fmt.Errorf(".npy header %s: expected the keys 'descr', 'fortran_order' and 'shape', %q is missing", quoteHeader(text), key)
		}
	}
	if len(fields) != 3 {
		return nil, fmt.Errorf(".npy header %s: expected the keys 'descr', 'fortran_order' and 'shape' only, got %d keys", quoteHeader(text), len(fields))
	}
	descr, ok := fields["descr"].(string)
	if !ok {
		return nil, fmt.Errorf(".npy header: expected 'descr' to name an element type such as '<f4', got %v (structured types are not read)", fields["descr"])
	}
	if h.size, err = npyElemSize(descr); err != nil {
		return nil, err
	}
	h.descr = descr
	if h.fortran, ok = fields["fortran_order"].(bool); !ok {
		return nil, fmt.Errorf(".npy header: expected 'fortran_order' to be True or False, got %v", fields["fortran_order"])
	}
	shape, ok := fields["shape"].([]int)
	if !ok {
		return nil, fmt.Errorf(".npy header: expected 'shape' to be a tuple of sizes such as (3, 8), got %v", fields["shape"])
	}
	if len(shape) > npyMaxRank {
		return nil, fmt.Errorf(".npy header: shape has %d dimensions, more than NumPy's %d", len(shape), npyMaxRank)
	}
	h.shape = shape
	h.count = 1
	for _, d := range shape {
		if d != 0 && h.count > math.MaxInt/h.size/d {
			return nil, fmt.Errorf(".npy header: shape %s holds more values than a file can (its data would be over %d bytes)", pyTuple(shape), math.MaxInt)
		}
		h.count *= d
	}
	return h, nil
}

// npyElemSize checks an element type descriptor (byte order, kind, size:
// <f4, |u1, >i8) and returns its size in bytes.
func npyElemSize(descr string) (int, error) {
	if len(descr) >= 3 && strings.ContainsRune("<>|=", rune(descr[0])) && npyDtypes[descr[1:]] {
		size, _ := strconv.Atoi(descr[2:])
		if size > 1 && descr[0] == '|' {
			return 0, fmt.Errorf(".npy element type %q: a type of %d bytes needs a byte order, < or >", descr, size)
		}
		if descr[0] != '=' {
			return size, nil
		}
	}
	return 0, fmt.Errorf(".npy element type %q: expected a real, integer or boolean type (f4, f8, i1 to i8, u1 to u8, b1) with its byte order, such as '<f4'", descr)
}

// quoteHeader quotes a header for a message, cut to 80 bytes.
func quoteHeader(text string) string {
	text = strings.TrimRight(text, " \n")
	if len(text) > 80 {
		return strconv.Quote(text[:80]) + "…"
	}
	return strconv.Quote(text)
}

// pyTuple writes a shape as Python does: (3, 8), (3,), ().
func pyTuple(shape []int) string {
	parts := make([]string, len(shape))
	for i, d := range shape {
		parts[i] = strconv.Itoa(d)
	}
	if len(parts) == 1 {
		return "(" + parts[0] + ",)"
	}
	return "(" + strings.Join(parts, ", ") + ")"
}

// pyLiteral parses the Python literals of a .npy header: a dict of string
// keys whose values are strings, True, False or tuples of integers.
type pyLiteral struct {
	s string
	i int
}

func (p *pyLiteral) space() {
	for p.i < len(p.s) && strings.IndexByte(" \t\r\n", p.s[p.i]) >= 0 {
		p.i++
	}
}

func (p *pyLiteral) expect(c byte) error {
	p.space()
	if p.i >= len(p.s) || p.s[p.i] != c {
		return p.unexpected(fmt.Sprintf("%q", c))
	}
	p.i++
	return nil
}

func (p *pyLiteral) unexpected(want string) error {
	if p.i >= len(p.s) {
		return fmt.Errorf("expected %s, got the end of the header", want)
	}
	return fmt.Errorf("expected %s at byte %d, got %q", want, p.i, p.s[p.i:min(len(p.s), p.i+12)])
}

func (p *pyLiteral) peek() byte {
	p.space()
	if p.i >= len(p.s) {
		return 0
	}
	return p.s[p.i]
}

func (p *pyLiteral) dict() (map[string]any, error) {
	if err := p.expect('{'); err != nil {
		return nil, err
	}
	fields := map[string]any{}
	for p.peek() != '}' {
		key, err := p.str()
		if err != nil {
			return nil, err
		}
		if _, dup := fields[key]; dup {
			return nil, fmt.Errorf("key %q is given twice", key)
		}
		if err := p.expect(':'); err != nil {
			return nil, err
		}
		if fields[key], err = p.value(); err != nil {
			return nil, fmt.Errorf("%q: %w", key, err)
		}
		if p.peek() != ',' {
			break
		}
		p.i++
	}
	if err := p.expect('}'); err != nil {
		return nil, err
	}
	p.space()
	if p.i != len(p.s) {
		return nil, p.unexpected("the end of the header")
	}
	return fields, nil
}

func (p *pyLiteral) value() (any, error) {
	switch c := p.peek(); {
	case c == '\'' || c == '"':
		return p.str()
	case c == '(':
		return p.tuple()
	case strings.HasPrefix(p.s[p.i:], "True"):
		p.i += 4
		return true, nil
	case strings.HasPrefix(p.s[p.i:], "False"):
		p.i += 5
		return false, nil
	}
	return nil, p.unexpected("a string, True, False or a tuple")
}

// str reads a quoted string without escapes.
func (p *pyLiteral) str() (string, error) {
	q := p.peek()
	if q != '\'' && q != '"' {
		return "", p.unexpected("a quoted key")
	}
	end := strings.IndexByte(p.s[p.i+1:], q)
	if end < 0 {
		return "", fmt.Errorf("string at byte %d is not closed", p.i)
	}
	s := p.s[p.i+1 : p.i+1+end]
	if strings.ContainsAny(s, "\\\n") {
		return "", fmt.Errorf("string at byte %d has an escape or a line break", p.i)
	}
	p.i += end + 2
	return s, nil
}

// tuple reads a tuple of non-negative integers: (), (3,), (3, 8).
func (p *pyLiteral) tuple() ([]int, error) {
	if err := p.expect('('); err != nil {
		return nil, err
	}
	out := []int{}
	commas := 0
	for p.peek() != ')' {
		start := p.i
		for p.i < len(p.s) && isDigit(p.s[p.i]) {
			p.i++
		}
		if p.i == start {
			return nil, p.unexpected("a non-negative integer")
		}
		d, err := strconv.Atoi(p.s[start:p.i])
		if err != nil {
			return nil, fmt.Errorf("size %s is too large", p.s[start:p.i])
		}
		if p.i < len(p.s) && p.s[p.i] == 'L' { // written by Python 2
			p.i++
		}
		out = append(out, d)
		if p.peek() != ',' {
			break
		}
		p.i++
		commas++
	}
	if err := p.expect(')'); err != nil {
		return nil, err
	}
	if len(out) == 1 && commas == 0 {
		return nil, fmt.Errorf("(%d) is a number, not a tuple: a shape of one dimension is written (%d,)", out[0], out[0])
	}
	return out, nil
}

// npyReader reads the values of a .npy array after its header, a run of
// elements at a time, and decodes each run with the .npy library.
type npyReader struct {
	r    io.Reader
	h    *npyHeader
	read int // elements read
}

// errShortData is wrapped when a .npy file has fewer bytes of data than its
// shape calls for.
var errShortData = errors.New("data ends early")

// npyPiece is the most bytes of data read and decoded at a time, so that
// memory follows the bytes a file has, not the shape its header declares.
const npyPiece = 1 << 20

// values reads the next n elements (n ≤ what is left) as float64.
func (nr *npyReader) values(n int) ([]float64, error) {
	out := make([]float64, 0, min(n, npyPiece))
	for len(out) < n {
		k := min(n-len(out), npyPiece/nr.h.size)
		v, err := nr.piece(k)
		if err != nil {
			return nil, err
		}
		out = append(out, v...)
	}
	return out, nil
}

// piece reads and decodes the next k elements.
func (nr *npyReader) piece(k int) ([]float64, error) {
	raw := make([]byte, k*nr.h.size)
	if got, err := io.ReadFull(nr.r, raw); err != nil {
		if err == io.ErrUnexpectedEOF || err == io.EOF {
			have := nr.read*nr.h.size + got
			return nil, fmt.Errorf("%w: the header's shape %s of %s needs %d bytes of data, the file has %d",
				errShortData, pyTuple(nr.h.shape), nr.h.descr, nr.h.count*nr.h.size, have)
		}
		return nil, err
	}
	nr.read += k
	var arr npy.Array
	err := readSafely(func() error {
		// A header the library reads for certain: the checked element
		// type, in the key order it expects, for a flat run of k values.
		dict := fmt.Sprintf("{'descr': '%s', 'fortran_order': False, 'shape': (%d,), }", nr.h.descr, k)
		dict += strings.Repeat(" ", (64-(10+len(dict)+1)%64)%64) + "\n"
		hdr := append([]byte(npyMagic+"\x01\x00"), byte(len(dict)), byte(len(dict)>>8))
		lib, err := npy.NewReader(io.MultiReader(bytes.NewReader(append(hdr, dict...)), bytes.NewReader(raw)))
		if err != nil {
			return err
		}
		return lib.Read(&arr)
	})
	if err != nil {
		return nil, fmt.Errorf("decoding .npy data (%s): %w", nr.h.descr, err)
	}
	data, err := floatsOf(arr.Data())
	if err != nil {
		return nil, err
	}
	if len(data) != k {
		return nil, fmt.Errorf("decoding .npy data (%s): expected %d values, got %d", nr.h.descr, k, len(data))
	}
	return data, nil
}

// ReadNPY reads a NumPy .npy array of any real, integer or boolean dtype,
// in C or Fortran order (NEP 1, "A Simple File Format for NumPy Arrays").
// The header is checked before anything else is read: its magic, version,
// length (at most NumPy's 10000 bytes), keys in any order, element type
// and shape; the data must have the bytes the shape calls for, and is
// read as they come, so a header that declares more than the file holds
// costs no memory. Bytes after the data are ignored, as NumPy does.
func ReadNPY(r io.Reader, spec Spec) (*Batch, error) { return readAll(newNPYSource(r, spec)) }

// npySource reads the samples of a .npy array: C-order data as it comes,
// Fortran-order data whole and reordered.
type npySource struct {
	nr     *npyReader
	n      int // samples
	sample []int
	per    int // values per sample
	whole  []float64
}

func newNPYSource(r io.Reader, spec Spec) (*npySource, error) {
	h, err := readNPYHeader(r)
	if err != nil {
		return nil, err
	}
	n, sample, err := fitSamples(h.shape, spec)
	if err != nil {
		return nil, err
	}
	s := &npySource{nr: &npyReader{r: r, h: h}, n: n, sample: sample, per: Product(sample)}
	if h.fortran && len(h.shape) > 1 {
		data, err := s.nr.values(h.count)
		if err != nil {
			return nil, err
		}
		s.whole = fromFortran(data, h.shape)
	}
	return s, nil
}

func (s *npySource) next(n, first int) (*Batch, error) {
	n = min(n, s.n-first)
	if n <= 0 {
		return nil, io.EOF
	}
	var data []float64
	if s.whole != nil {
		data = s.whole[first*s.per : (first+n)*s.per]
	} else {
		var err error
		if data, err = s.nr.values(n * s.per); err != nil {
			return nil, err
		}
	}
	return &Batch{Shape: append([]int{n}, s.sample...), Data: data, Samples: n}, nil
}

// readSafely is the package's one recovery point: it runs a call into the
// .npy library, a dependency that may panic on data it does not expect,
// and turns a panic into an error.
func readSafely(f func() error) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("malformed data: %v", r)
		}
	}()
	return f()
}

// fromFortran reorders column-major data of the given shape row-major.
func fromFortran(data []float64, shape []int) []float64 {
	out := make([]float64, len(data))
	idx := make([]int, len(shape))
	for k := range out {
		// k is the row-major position; find the column-major offset.
		off, stride := 0, 1
		for d := 0; d < len(shape); d++ {
			off += idx[d] * stride
			stride *= shape[d]
		}
		out[k] = data[off]
		for d := len(shape) - 1; d >= 0; d-- {
			idx[d]++
			if idx[d] < shape[d] {
				break
			}
			idx[d] = 0
		}
	}
	return out
}

// floatsOf converts a slice of a numeric type to float64.
func floatsOf(v any) ([]float64, error) {
	switch s := v.(type) {
	case []float64:
		return s, nil
	case []float32:
		return convert(s), nil
	case []int8:
		return convert(s), nil
	case []int16:
		return convert(s), nil
	case []int32:
		return convert(s), nil
	case []int64:
		return convert(s), nil
	case []uint8:
		return convert(s), nil
	case []uint16:
		return convert(s), nil
	case []uint32:
		return convert(s), nil
	case []uint64:
		return convert(s), nil
	case []bool:
		out := make([]float64, len(s))
		for i, b := range s {
			if b {
				out[i] = 1
			}
		}
		return out, nil
	}
	return nil, fmt.Errorf("element type %T is not a real number type", v)
}

// number is the element types a .npy array converts from.
type number interface {
	~float32 | ~float64 | ~int8 | ~int16 | ~int32 | ~int64 | ~uint8 | ~uint16 | ~uint32 | ~uint64
}

func convert[T number](s []T) []float64 {
	out := make([]float64, len(s))
	for i, v := range s {
		out[i] = float64(v)
	}
	return out
}
