package samples

import (
	"errors"
	"fmt"
	"io"
	"math"
	"os"

	"github.com/apportion/apportion/onnxlite"
)

// ErrTooMany is wrapped when a file holds more samples than
// Options.MaxSamples allows.
var ErrTooMany = errors.New("too many samples")

// source reads the samples of one format, a batch at a time.
type source interface {
	// next reads up to n samples (n ≥ 1), the first of which has index
	// first in the file, into a batch whose Bad keys count from its first
	// sample. After the last sample it returns io.EOF.
	next(n, first int) (*Batch, error)
}

// Stream reads the samples of one file a batch at a time, so that a file
// of any length is read, and its samples explained, in constant memory.
// Each Batch records in First where its samples start in the file, and
// its errors name samples by their index in the file. Read, ReadFile and
// the format readers read a whole file through a Stream.
type Stream struct {
	name string
	spec Spec
	opt  Options
	src  source
	// done counts the samples returned so far; batches the batches (an
	// empty .pb tensor read with Options.AllowEmpty is one of no samples).
	done, batches int
	err           error // sticky: the first error, or io.EOF
	// bare leaves errors unwrapped, for the format readers, whose
	// callers name the file.
	bare bool
	// features are the CSV header's names of the columns read; ignored
	// the columns a read by feature names leaves out.
	features, ignored []string
}

// NewStream starts reading r, a file called name whose extension selects
// the format, as samples of spec. It reads what the format puts first (a
// CSV header, a .npy header, a JSON document's first sample; a .pb tensor
// whole) and reports it when malformed. Errors name the file and the
// input.
func NewStream(r io.Reader, name string, spec Spec, opt Options) (*Stream, error) {
	s := &Stream{name: name, spec: spec, opt: opt}
	f, err := FormatOf(name)
	if err == nil {
		s.src, err = newSource(f, r, spec, opt)
	}
	if err != nil {
		return nil, s.wrap(err)
	}
	if c, ok := s.src.(*csvSource); ok {
		s.features, s.ignored = c.features(), c.ignored()
	}
	return s, nil
}

func newSource(f Format, r io.Reader, spec Spec, opt Options) (source, error) {
	switch f {
	case PB:
		return newPBSource(r, spec, opt.AllowEmpty)
	case NPY:
		return newNPYSource(r, spec)
	case JSON:
		return newJSONSource(r, spec)
	case Text:
		b, err := ReadText(r, spec, opt.Vocabulary)
		if err != nil {
			return nil, err
		}
		return &wholeSource{b: b}, nil
	default:
		return newCSVSource(r, spec, opt.Features)
	}
}

// OpenStream opens the file at path and starts reading it (see
// NewStream); Close closes the file.
func OpenStream(path string, spec Spec, opt Options) (*Stream, io.Closer, error) {
	if _, err := FormatOf(path); err != nil {
		return nil, nil, &FileError{Name: path, Input: spec.Name, Err: err}
	}
	f, err := openRegular(path)
	if err != nil {
		return nil, nil, &FileError{Name: path, Input: spec.Name, Err: err}
	}
	s, err := NewStream(f, path, spec, opt)
	if err != nil {
		f.Close()
		return nil, nil, err
	}
	return s, f, nil
}

// openRegular opens the file at path for reading, refusing anything but a
// regular file (a FIFO would block, a directory has no samples).
func openRegular(path string) (*os.File, error) {
	st, err := os.Stat(path)
	if err != nil {
		return nil, err
	}
	if !st.Mode().IsRegular() {
		return nil, fmt.Errorf("%s is not a regular file", path)
	}
	return os.Open(path)
}

func (s *Stream) wrap(err error) error {
	if s.bare {
		return err
	}
	return &FileError{Name: s.name, Input: s.spec.Name, Err: err}
}

// FileError is an error of reading the samples of one file: it names the
// file and the model input they are read for. A caller that names the
// file its own way (the HTTP API's "inputs" field) words Err.
type FileError struct {
	// Name is the file's name; Input the model input's.
	Name, Input string
	Err         error
}

func (e *FileError) Error() string {
	return fmt.Sprintf("input %s (for %q): %v", e.Name, e.Input, e.Err)
}

func (e *FileError) Unwrap() error { return e.Err }

// Features are the CSV header's names of the columns read, when the file
// has a header.
func (s *Stream) Features() []string { return s.features }

// Ignored names the columns of a CSV file read by the model's feature
// names that are not features, in file order (see Batch.Ignored).
func (s *Stream) Ignored() []string { return s.ignored }

// Next returns the next batch of at most n samples (n < 1 means 1), or
// io.EOF after the last. Without Options.KeepBad a sample that cannot be
// read, or holds a NaN or an infinity, is the error; with it, the sample
// is marked in Batch.Bad. A file with more than Options.MaxSamples samples
// is an error wrapping ErrTooMany once the sample past the limit is
// reached, before it is read whole. After an error Next returns it again.
func (s *Stream) Next(n int) (*Batch, error) {
	if s.err != nil {
		return nil, s.err
	}
	n = max(n, 1)
	if max := s.opt.MaxSamples; max > 0 {
		n = min(n, max+1-s.done)
	}
	b, err := s.src.next(n, s.done)
	switch {
	case err == io.EOF && s.done == 0 && s.batches == 0:
		err = s.wrap(errors.New("expected at least one sample, got none"))
	case err == io.EOF:
	case err != nil:
		err = s.wrap(err)
	case s.opt.MaxSamples > 0 && s.done+b.Samples > s.opt.MaxSamples:
		err = s.wrap(fmt.Errorf("%w: more than the %d samples allowed", ErrTooMany, s.opt.MaxSamples))
	}
	if err != nil {
		s.err = err
		return nil, err
	}
	b.Name, b.First = s.name, s.done
	if b.Features == nil {
		b.Features, b.Ignored = s.features, s.ignored
	}
	if s.spec.Elem == onnxlite.Float && b.Tensor == nil {
		b.checkFloat32()
	}
	s.done += b.Samples
	s.batches++
	if !s.opt.KeepBad {
		if err = b.FirstBad(); err == nil {
			err = b.CheckFinite()
		}
		var whole *wholeSampleError
		if errors.As(err, &whole) {
			err = fmt.Errorf("sample %d: %w", b.First+b.firstBadIndex(), err)
		}
		if err != nil {
			s.err = s.wrap(err)
			return nil, s.err
		}
	}
	return b, nil
}

// readChunk is the number of samples Read takes from a stream at a time.
const readChunk = 4096

// All reads the rest of the stream as one batch. With Options.KeepBad, a
// file none of whose samples can be read is the error of its first.
func (s *Stream) All() (*Batch, error) {
	chunk := readChunk
	if _, whole := s.src.(*wholeSource); whole {
		chunk = math.MaxInt // keeps Batch.Tensor
	}
	var parts []*Batch
	for {
		b, err := s.Next(chunk)
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, err
		}
		parts = append(parts, b)
	}
	if len(parts) == 0 {
		return nil, s.err
	}
	all := parts[0]
	if len(parts) > 1 {
		all = concat(parts)
	}
	if all.Samples > 0 && len(all.Bad) == all.Samples {
		return nil, s.wrap(all.FirstBad())
	}
	return all, nil
}

// checkFloat32 marks bad the samples, not already bad, that hold a value a
// float32 input cannot take (see CheckFloat32).
func (b *Batch) checkFloat32() {
	for i := 0; i < b.Samples; i++ {
		if b.Bad[i] != nil {
			continue
		}
		if j, err := CheckFloat32(b.Sample(i)); err != nil {
			b.MarkBad(i, fmt.Errorf("sample %d, index %d: %w", b.First+i, j, err))
		}
	}
}

// CheckFloat32 returns the index of the first value of x a float32 input
// cannot take, and why: beyond ±3.4e38, or so small that it would read as
// 0 (below 1.4e-45 in magnitude; IEEE 754 binary32). NaN and ±Inf are left
// to CheckFinite.
func CheckFloat32(x []float64) (int, error) {
	for j, v := range x {
		f := float32(v)
		switch {
		case math.IsInf(float64(f), 0) && !math.IsInf(v, 0):
			return j, fmt.Errorf("%v is out of the float32 range of the input (larger than 3.4e38 in magnitude)", v)
		case f == 0 && v != 0:
			return j, fmt.Errorf("%v is out of the float32 range of the input (smaller than 1.4e-45 in magnitude, it would read as 0)", v)
		}
	}
	return 0, nil
}

// concat joins batches of one sample shape, in order, into one.
func concat(parts []*Batch) *Batch {
	n, size := 0, 0
	for _, p := range parts {
		n += p.Samples
		size += len(p.Data)
	}
	first := parts[0]
	all := &Batch{Name: first.Name, First: first.First, Samples: n, Features: first.Features, Ignored: first.Ignored,
		Shape: append([]int{n}, first.SampleShape()...), Data: make([]float64, 0, size)}
	for _, p := range parts {
		for i, err := range p.Bad {
			all.MarkBad(p.First-first.First+i, err)
		}
		all.Data = append(all.Data, p.Data...)
	}
	return all
}

// readAll reads the whole of src as one batch, for the format readers.
func readAll(src source, err error) (*Batch, error) {
	if err != nil {
		return nil, err
	}
	s := &Stream{src: src, opt: Options{KeepBad: true}, bare: true}
	if c, ok := src.(*csvSource); ok {
		s.features, s.ignored = c.features(), c.ignored()
	}
	return s.All()
}
