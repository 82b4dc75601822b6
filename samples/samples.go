// Package samples reads the samples a model runs on, from CSV, JSON, NumPy
// .npy and ONNX TensorProto (.pb) files, and turns them into tensors of the
// model's input type. A file is read sample by sample: one that cannot be
// read (a short CSV row, a field that is not a number, a JSON sample of the
// wrong shape, a value out of range) is reported with where it is, and the
// others survive. Read takes a whole file; Stream and TableReader read one a
// batch at a time, in memory that does not grow with its length. No input
// makes a reader panic, and what a reader allocates follows the bytes it is
// given, not the sizes a header declares.
package samples

import (
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"

	"github.com/apportion/apportion/onnxlite"
)

// MaxBytes bounds the size of one file the path helpers read into memory.
const MaxBytes = 256 << 20

// Spec is the graph input samples are read for: its name, element type and
// declared shape, whose first axis is the batch.
type Spec struct {
	Name string
	Elem onnxlite.DataType
	// Shape is the declared shape; -1 marks a symbolic or unknown
	// dimension. It is nil when the model declares no shape.
	Shape    []int
	HasShape bool
}

// SpecOf returns the spec of a graph input.
func SpecOf(vi *onnxlite.ValueInfo) Spec {
	s := Spec{Name: vi.Name}
	if vi.Type == nil {
		return s
	}
	s.Elem = vi.Type.Elem
	if vi.Type.HasShape {
		s.HasShape = true
		s.Shape = make([]int, len(vi.Type.Shape))
		for i, d := range vi.Type.Shape {
			if d.HasValue {
				s.Shape[i] = int(d.Value)
			} else {
				s.Shape[i] = -1
			}
		}
	}
	return s
}

// PerSample is the shape of one sample: the declared shape without its
// leading batch dimension. ok is false when the rank is not declared.
func (s Spec) PerSample() (shape []int, ok bool) {
	if !s.HasShape || len(s.Shape) == 0 {
		return nil, s.HasShape
	}
	return s.Shape[1:], true
}

// FixedSample is the shape of one sample when every dimension of it is
// declared; ok is false otherwise.
func (s Spec) FixedSample() (shape []int, ok bool) {
	ps, ok := s.PerSample()
	if !ok || !fullyKnown(ps) {
		return nil, false
	}
	return ps, true
}

// Batch is the content of one file: samples of one shape.
type Batch struct {
	// Name is the file's name (or another name given to the reader).
	Name string
	// Shape is the full tensor shape: as stored for .pb files, otherwise
	// [samples, per-sample shape...].
	Shape []int
	// Data holds the values row-major as float64.
	Data []float64
	// Samples is the number of samples, Shape[0] (1 for a rank-0 tensor).
	Samples int
	// First is the index in the file of the batch's first sample: 0, or
	// where a batch of a Stream starts.
	First int
	// Features holds the CSV header's names of the columns read, when the
	// file has a header.
	Features []string
	// Ignored names the columns of a CSV file read by the model's feature
	// names that are not features, in file order: a caller may say they
	// were left out.
	Ignored []string
	// Tensor is the decoded .pb tensor, nil for other formats.
	Tensor *onnxlite.Tensor
	// Bad holds, by sample index, the samples that could not be read (a CSV
	// row of the wrong length or with a field that is not a number, a JSON
	// sample of the wrong shape). Their values are NaN. A caller that
	// explains samples one by one reports these and goes on with the rest.
	Bad map[int]error
}

// MarkBad records that sample i could not be read (its values are to be
// NaN, as the readers leave them).
func (b *Batch) MarkBad(i int, err error) {
	if b.Bad == nil {
		b.Bad = map[int]error{}
	}
	b.Bad[i] = err
}

// FirstBad returns the error of the lowest-numbered bad sample, or nil.
func (b *Batch) FirstBad() error {
	if first := b.firstBadIndex(); first >= 0 {
		return b.Bad[first]
	}
	return nil
}

// firstBadIndex is the index of the first sample that could not be read,
// or -1.
func (b *Batch) firstBadIndex() int {
	first := -1
	for i := range b.Bad {
		if first < 0 || i < first {
			first = i
		}
	}
	return first
}

// SampleSize is the number of values in one sample.
func (b *Batch) SampleSize() int {
	if b.Samples == 0 {
		return 0
	}
	return len(b.Data) / b.Samples
}

// SampleShape is the shape of one sample.
func (b *Batch) SampleShape() []int {
	if len(b.Shape) == 0 {
		return nil
	}
	return b.Shape[1:]
}

// Sample returns the values of sample i.
func (b *Batch) Sample(i int) []float64 {
	n := b.SampleSize()
	return b.Data[i*n : (i+1)*n]
}

// Rows returns the samples, one slice each (sharing Data).
func (b *Batch) Rows() [][]float64 {
	rows := make([][]float64, b.Samples)
	for i := range rows {
		rows[i] = b.Sample(i)
	}
	return rows
}

// ErrNonFinite is wrapped by the errors for NaN and ±Inf values.
var ErrNonFinite = errors.New("value is not a finite number")

// NonFiniteError is a NaN or infinite value at a sample position.
type NonFiniteError struct {
	Sample, Index int
	Value         float64
}

func (e *NonFiniteError) Error() string {
	return fmt.Sprintf("sample %d, index %d: %v %s", e.Sample, e.Index, e.Value, ErrNonFinite)
}

func (e *NonFiniteError) Unwrap() error { return ErrNonFinite }

// CheckFinite returns a NonFiniteError for the first NaN or infinity of
// the batch.
func (b *Batch) CheckFinite() error {
	per := b.SampleSize()
	for i, v := range b.Data {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			if per == 0 {
				return &NonFiniteError{Sample: b.First, Index: i, Value: v}
			}
			return &NonFiniteError{Sample: b.First + i/per, Index: i % per, Value: v}
		}
	}
	return nil
}

// CheckFinite reports the first NaN or infinity of one sample x by its
// index; the error wraps ErrNonFinite.
func CheckFinite(x []float64) error {
	for j, v := range x {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Errorf("index %d: %v %w", j, v, ErrNonFinite)
		}
	}
	return nil
}

// Format is a file format, named by its extension.
type Format string

// The formats.
const (
	CSV  Format = ".csv"
	JSON Format = ".json"
	NPY  Format = ".npy"
	PB   Format = ".pb"
	// Text is one text per line, read as token ids with a vocabulary
	// (ReadText).
	Text Format = ".txt"
)

// FormatOf returns the format of the file called name, by its extension
// (in any case).
func FormatOf(name string) (Format, error) {
	switch f := Format(strings.ToLower(filepath.Ext(name))); f {
	case CSV, JSON, NPY, PB, Text:
		return f, nil
	default:
		return "", fmt.Errorf("unknown file type %q: expected .pb, .npy, .json, .csv or .txt", string(f))
	}
}

// Options tune Read and ReadFile.
type Options struct {
	// KeepBad keeps the samples that cannot be read, or hold a NaN or an
	// infinity, in the batch (marked in Batch.Bad, or left for the caller
	// to find), for a caller that handles samples one by one. Without it
	// the first of them is the error.
	KeepBad bool
	// Features are the model's feature names: a CSV file whose header
	// names them is read by name (see ReadCSV).
	Features []string
	// AllowEmpty accepts a .pb tensor with no elements along its first
	// axis, for a caller that feeds the tensor as it is (an empty list of
	// axes, a batch of none) rather than explaining its samples.
	AllowEmpty bool
	// MaxSamples, when positive, is the most samples a file may hold; a
	// reader stops at the sample past it with an error wrapping
	// ErrTooMany.
	MaxSamples int
	// Vocabulary reads a text file (.txt) of a model of token ids.
	Vocabulary *Vocabulary
}

// Read reads samples of spec from r, a file called name whose extension
// selects the format. Errors name the file and the input.
func Read(r io.Reader, name string, spec Spec, opt Options) (*Batch, error) {
	s, err := NewStream(r, name, spec, opt)
	if err != nil {
		return nil, err
	}
	return s.All()
}

// ReadFile reads the file at path (see Read), refusing a file of more than
// MaxBytes; OpenStream reads a file of any size a batch at a time.
func ReadFile(path string, spec Spec, opt Options) (*Batch, error) {
	if st, err := os.Stat(path); err == nil && st.Size() > MaxBytes {
		return nil, &FileError{Name: path, Input: spec.Name, Err: fmt.Errorf("file is %d bytes, more than the %d bytes an input may have", st.Size(), MaxBytes)}
	}
	s, f, err := OpenStream(path, spec, opt)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	return s.All()
}

// ReadLimited reads the file at path, refusing one of more than MaxBytes.
func ReadLimited(path string) ([]byte, error) {
	st, err := os.Stat(path)
	if err != nil {
		return nil, err
	}
	if st.Size() > MaxBytes {
		return nil, fmt.Errorf("file is %d bytes, more than the %d bytes an input may have", st.Size(), MaxBytes)
	}
	return os.ReadFile(path)
}

// ShapeString formats a shape with "?" for unknown dimensions: [1 ? 3].
func ShapeString(s []int) string {
	parts := make([]string, len(s))
	for i, d := range s {
		if d < 0 {
			parts[i] = "?"
		} else {
			parts[i] = strconv.Itoa(d)
		}
	}
	return "[" + strings.Join(parts, " ") + "]"
}

// Product is the number of values of a shape, ∏s.
func Product(s []int) int {
	p := 1
	for _, d := range s {
		p *= d
	}
	return p
}

func fullyKnown(s []int) bool {
	for _, d := range s {
		if d < 0 {
			return false
		}
	}
	return true
}

// matchShape checks a stored shape against a declared one (-1 matches any size).
func matchShape(got, want []int) error {
	if len(got) != len(want) {
		return fmt.Errorf("expected a tensor of rank %d (shape %s), got rank %d (shape %s)", len(want), ShapeString(want), len(got), ShapeString(got))
	}
	for i := range want {
		if want[i] >= 0 && got[i] != want[i] {
			return fmt.Errorf("expected shape %s, got %s (dimension %d: expected %d, got %d)", ShapeString(want), ShapeString(got), i, want[i], got[i])
		}
	}
	return nil
}

// fitSamples decides how an array of shape ds splits into samples of the
// per-sample shape ps (-1 in ps matches any size). It accepts, in this order:
// [n, ps...] (n samples), ps (one sample), [P] (one flat sample) and [n, P]
// (n flat samples), where P is the number of values in one sample.
func fitSamples(ds []int, spec Spec) (n int, sample []int, err error) {
	ps, ok := spec.PerSample()
	if !ok {
		// No declared rank: the whole array is one batch, first axis samples.
		if len(ds) == 0 {
			return 1, nil, nil
		}
		return ds[0], ds[1:], nil
	}
	matches := func(got []int) bool {
		if len(got) != len(ps) {
			return false
		}
		for i := range ps {
			if ps[i] >= 0 && got[i] != ps[i] {
				return false
			}
		}
		return true
	}
	if len(ds) == len(ps)+1 && matches(ds[1:]) {
		return ds[0], ds[1:], nil
	}
	if matches(ds) {
		return 1, ds, nil
	}
	if fullyKnown(ps) {
		p := Product(ps)
		if len(ds) == 1 && ds[0] == p {
			return 1, ps, nil
		}
		if len(ds) == 2 && ds[1] == p {
			return ds[0], ps, nil
		}
		got := Product(ds)
		if len(ds) >= 1 {
			got = Product(ds[len(ds)-1:])
		}
		return 0, nil, fmt.Errorf("expected samples of shape %s (%d values each), got an array of shape %s (%d values per row)", ShapeString(ps), p, ShapeString(ds), got)
	}
	return 0, nil, fmt.Errorf("expected samples of shape %s, got an array of shape %s", ShapeString(ps), ShapeString(ds))
}

func newBatch(ds []int, data []float64, spec Spec) (*Batch, error) {
	n, sample, err := fitSamples(ds, spec)
	if err != nil {
		return nil, err
	}
	if n == 0 {
		return nil, fmt.Errorf("expected at least one sample, got none")
	}
	return &Batch{Shape: append([]int{n}, sample...), Data: data, Samples: n}, nil
}
