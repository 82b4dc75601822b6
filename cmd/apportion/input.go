package main

import (
	"bytes"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"

	"codeberg.org/sbinet/npyio/npy"

	"github.com/apportion/apportion/onnxlite"
)

// maxInputBytes bounds the size of one input file the CLI reads into memory.
const maxInputBytes = 256 << 20

// inputSpec is a graph input a file is bound to.
type inputSpec struct {
	Name string
	Elem onnxlite.DataType
	// Shape is the declared shape; -1 marks a symbolic or unknown dimension.
	// It is nil when the model declares no shape.
	Shape    []int
	HasShape bool
}

// perSample is the shape of one sample: the declared shape without its
// leading batch dimension. ok is false when the rank is not declared.
func (s inputSpec) perSample() (shape []int, ok bool) {
	if !s.HasShape || len(s.Shape) == 0 {
		return nil, s.HasShape
	}
	return s.Shape[1:], true
}

// batch is the content of one input file.
type batch struct {
	Path string
	// Shape is the full tensor shape: as stored for .pb files, otherwise
	// [samples, per-sample shape...].
	Shape []int
	// Data holds the values row-major as float64.
	Data []float64
	// Samples is the number of samples, Shape[0] (1 for a rank-0 tensor).
	Samples int
	// Features holds the CSV header names, when the file has a header.
	Features []string
	// Tensor is the decoded .pb tensor, nil for other formats.
	Tensor *onnxlite.Tensor
	// Bad holds, by sample index, the samples that could not be read (a CSV
	// row of the wrong length or with a field that is not a number, a JSON
	// sample of the wrong shape). Their values are NaN. A caller that
	// explains samples one by one reports these and goes on with the rest.
	Bad map[int]error
}

// markBad records that sample i could not be read.
func (b *batch) markBad(i int, err error) {
	if b.Bad == nil {
		b.Bad = map[int]error{}
	}
	b.Bad[i] = err
}

// firstBad returns the error of the lowest-numbered bad sample, or nil.
func (b *batch) firstBad() error {
	first := -1
	for i := range b.Bad {
		if first < 0 || i < first {
			first = i
		}
	}
	if first < 0 {
		return nil
	}
	return b.Bad[first]
}

// SampleSize is the number of values in one sample.
func (b *batch) SampleSize() int {
	if b.Samples == 0 {
		return 0
	}
	return len(b.Data) / b.Samples
}

// SampleShape is the shape of one sample.
func (b *batch) SampleShape() []int {
	if len(b.Shape) == 0 {
		return nil
	}
	return b.Shape[1:]
}

// Sample returns the values of sample i.
func (b *batch) Sample(i int) []float64 {
	n := b.SampleSize()
	return b.Data[i*n : (i+1)*n]
}

// errNonFinite is wrapped by the errors for NaN and ±Inf input values.
var errNonFinite = errors.New("value is not a finite number")

// nonFiniteError is a NaN or infinite value at a sample position.
type nonFiniteError struct {
	Sample, Index int
	Value         float64
}

func (e *nonFiniteError) Error() string {
	return fmt.Sprintf("sample %d, index %d: %v %s", e.Sample, e.Index, e.Value, errNonFinite)
}

func (e *nonFiniteError) Unwrap() error { return errNonFinite }

// readInput reads path by its extension (.pb, .npy, .json or .csv) as
// samples of spec, refusing NaN and ±Inf.
func readInput(path string, spec inputSpec) (*batch, error) {
	return readInputOpt(path, spec, false)
}

// readInputOpt is readInput; with keepNonFinite, NaN and ±Inf values are
// kept for the caller to judge sample by sample.
func readInputOpt(path string, spec inputSpec, keepNonFinite bool) (*batch, error) {
	if err := checkExt(path); err != nil {
		return nil, fmt.Errorf("input %s (for %q): %w", path, spec.Name, err)
	}
	st, err := os.Stat(path)
	if err != nil {
		return nil, fmt.Errorf("input %s (for %q): %w", path, spec.Name, err)
	}
	if st.Size() > maxInputBytes {
		return nil, fmt.Errorf("input %s (for %q): file is %d bytes, more than the %d bytes an input may have", path, spec.Name, st.Size(), maxInputBytes)
	}
	raw, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("input %s (for %q): %w", path, spec.Name, err)
	}
	return readInputBytes(path, raw, spec, keepNonFinite)
}

func checkExt(name string) error {
	switch ext := strings.ToLower(filepath.Ext(name)); ext {
	case ".pb", ".npy", ".json", ".csv":
		return nil
	default:
		return fmt.Errorf("unknown file type %q: expected .pb, .npy, .json or .csv", ext)
	}
}

// readInputBytes reads the content of the file name (whose extension picks
// the format) as samples of spec.
func readInputBytes(name string, raw []byte, spec inputSpec, keepNonFinite bool) (*batch, error) {
	b, err := parseInput(name, raw, spec)
	if err == nil && !keepNonFinite {
		if err = b.firstBad(); err == nil {
			err = checkFinite(b)
		}
	}
	if err != nil {
		return nil, fmt.Errorf("input %s (for %q): %w", name, spec.Name, err)
	}
	b.Path = name
	return b, nil
}

func parseInput(name string, raw []byte, spec inputSpec) (*batch, error) {
	if err := checkExt(name); err != nil {
		return nil, err
	}
	switch strings.ToLower(filepath.Ext(name)) {
	case ".pb":
		return readPB(raw, spec)
	case ".npy":
		return readNPY(raw, spec)
	case ".json":
		return readJSON(raw, spec)
	default:
		return readCSV(raw, spec)
	}
}

func readPB(raw []byte, spec inputSpec) (*batch, error) {
	t, err := decodeTensor(raw)
	if err != nil {
		return nil, err
	}
	data, err := tensorFloats(t)
	if err != nil {
		return nil, err
	}
	shape := t.Shape()
	if spec.HasShape {
		if err := matchShape(shape, spec.Shape); err != nil {
			return nil, err
		}
	}
	b := &batch{Shape: shape, Data: data, Samples: 1, Tensor: t}
	if len(shape) > 0 {
		b.Samples = shape[0]
	}
	if b.Samples == 0 {
		return nil, fmt.Errorf("expected at least one sample, got a tensor of shape %s", shapeString(shape))
	}
	return b, nil
}

// matchShape checks a stored shape against a declared one (-1 matches any size).
func matchShape(got, want []int) error {
	if len(got) != len(want) {
		return fmt.Errorf("expected a tensor of rank %d (shape %s), got rank %d (shape %s)", len(want), shapeString(want), len(got), shapeString(got))
	}
	for i := range want {
		if want[i] >= 0 && got[i] != want[i] {
			return fmt.Errorf("expected shape %s, got %s (dimension %d: expected %d, got %d)", shapeString(want), shapeString(got), i, want[i], got[i])
		}
	}
	return nil
}

// shapeString formats a shape with "?" for unknown dimensions.
func shapeString(s []int) string {
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

func product(s []int) int {
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

// fitSamples decides how an array of shape ds splits into samples of the
// per-sample shape ps (-1 in ps matches any size). It accepts, in this order:
// [n, ps...] (n samples), ps (one sample), [P] (one flat sample) and [n, P]
// (n flat samples), where P is the number of values in one sample.
func fitSamples(ds []int, spec inputSpec) (n int, sample []int, err error) {
	ps, ok := spec.perSample()
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
		p := product(ps)
		if len(ds) == 1 && ds[0] == p {
			return 1, ps, nil
		}
		if len(ds) == 2 && ds[1] == p {
			return ds[0], ps, nil
		}
		got := product(ds)
		if len(ds) >= 1 {
			got = product(ds[len(ds)-1:])
		}
		return 0, nil, fmt.Errorf("expected samples of shape %s (%d values each), got an array of shape %s (%d values per row)", shapeString(ps), p, shapeString(ds), got)
	}
	return 0, nil, fmt.Errorf("expected samples of shape %s, got an array of shape %s", shapeString(ps), shapeString(ds))
}

func newBatch(ds []int, data []float64, spec inputSpec) (*batch, error) {
	n, sample, err := fitSamples(ds, spec)
	if err != nil {
		return nil, err
	}
	if n == 0 {
		return nil, fmt.Errorf("expected at least one sample, got none")
	}
	return &batch{Shape: append([]int{n}, sample...), Data: data, Samples: n}, nil
}

func checkFinite(b *batch) error {
	per := b.SampleSize()
	for i, v := range b.Data {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			if per == 0 {
				return &nonFiniteError{Index: i, Value: v}
			}
			return &nonFiniteError{Sample: i / per, Index: i % per, Value: v}
		}
	}
	return nil
}

// readNPY reads a NumPy .npy array of any real or integer dtype.
func readNPY(raw []byte, spec inputSpec) (*batch, error) {
	r, err := npy.NewReader(bytes.NewReader(raw))
	if err != nil {
		return nil, fmt.Errorf("reading .npy header: %w", err)
	}
	shape := append([]int(nil), r.Header.Descr.Shape...)
	var arr npy.Array
	if err := safeCall(func() error { return r.Read(&arr) }); err != nil {
		return nil, fmt.Errorf("reading .npy data (%s, shape %v): %w", r.Header.Descr.Type, shape, err)
	}
	data, err := floatsOf(arr.Data())
	if err != nil {
		return nil, fmt.Errorf(".npy dtype %s: %w", r.Header.Descr.Type, err)
	}
	if len(data) != product(shape) {
		return nil, fmt.Errorf(".npy array of shape %v should hold %d values, got %d", shape, product(shape), len(data))
	}
	if arr.Fortran() && len(shape) > 1 {
		data = fromFortran(data, shape)
	}
	return newBatch(shape, data, spec)
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
		return append([]float64(nil), s...), nil
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

type real interface {
	~float32 | ~float64 | ~int8 | ~int16 | ~int32 | ~int64 | ~uint8 | ~uint16 | ~uint32 | ~uint64
}

func convert[T real](s []T) []float64 {
	out := make([]float64, len(s))
	for i, v := range s {
		out[i] = float64(v)
	}
	return out
}

// tensorFloats returns the elements of an ONNX tensor as float64.
func tensorFloats(t *onnxlite.Tensor) ([]float64, error) {
	out, err := floatsOf(t.Data)
	if err != nil {
		return nil, fmt.Errorf("tensor %q of type %s: %w", t.Name, typeName(t.DType), err)
	}
	return out, nil
}

// readJSON reads nested arrays of numbers.
func readJSON(raw []byte, spec inputSpec) (*batch, error) {
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.UseNumber()
	var v any
	if err := dec.Decode(&v); err != nil {
		return nil, fmt.Errorf("reading JSON: %w", err)
	}
	if _, err := dec.Token(); err != io.EOF {
		return nil, fmt.Errorf("reading JSON: expected one array, got more data after it")
	}
	var shape []int
	var data []float64
	err := flattenJSON(v, "", 0, &shape, &data)
	if err == nil {
		return newBatch(shape, data, spec)
	}
	if b := readJSONSamples(v, spec); b != nil {
		return b, nil
	}
	return nil, err
}

// readJSONSamples reads a top-level array as a list of samples one by one,
// so that one malformed sample does not cost the others. It returns nil
// unless the per-sample shape is fully known and at least one element is a
// well-formed sample.
func readJSONSamples(v any, spec inputSpec) *batch {
	list, isList := v.([]any)
	ps, ok := spec.perSample()
	if !isList || len(list) == 0 || !ok || !fullyKnown(ps) {
		return nil
	}
	p := product(ps)
	b := &batch{Shape: append([]int{len(list)}, ps...), Samples: len(list), Data: make([]float64, 0, p*len(list))}
	good := 0
	for i, e := range list {
		var shape []int
		var data []float64
		err := flattenJSON(e, "["+strconv.Itoa(i)+"]", 0, &shape, &data)
		if err == nil && len(data) == p && !slices.Equal(shape, ps) && !slices.Equal(shape, []int{p}) {
			err = fmt.Errorf("expected a sample of shape %s or %d flat values, got shape %s", shapeString(ps), p, shapeString(shape))
		} else if err == nil && len(data) != p {
			err = fmt.Errorf("expected %d values (shape %s), got %d (shape %s)", p, shapeString(ps), len(data), shapeString(shape))
		}
		if err != nil {
			b.markBad(i, err)
			for j := 0; j < p; j++ {
				b.Data = append(b.Data, math.NaN())
			}
			continue
		}
		good++
		b.Data = append(b.Data, data...)
	}
	if good == 0 {
		return nil
	}
	return b
}

// flattenJSON appends the numbers of v to data, fixing shape on the first
// visit of each depth and reporting ragged arrays by their path.
func flattenJSON(v any, path string, depth int, shape *[]int, data *[]float64) error {
	at := path
	if at == "" {
		at = "the top level"
	}
	switch x := v.(type) {
	case []any:
		if depth == len(*shape) && len(*data) == 0 {
			*shape = append(*shape, len(x))
		} else if depth >= len(*shape) {
			return fmt.Errorf("ragged array at %s: expected a number, got an array", at)
		} else if (*shape)[depth] != len(x) {
			return fmt.Errorf("ragged array at %s: expected %d elements, got %d", at, (*shape)[depth], len(x))
		}
		for i, e := range x {
			if err := flattenJSON(e, path+"["+strconv.Itoa(i)+"]", depth+1, shape, data); err != nil {
				return err
			}
		}
		return nil
	case json.Number:
		if depth != len(*shape) {
			return fmt.Errorf("ragged array at %s: expected an array of %d elements, got a number", at, (*shape)[depth])
		}
		f, err := strconv.ParseFloat(string(x), 64)
		if err != nil || math.IsInf(f, 0) {
			return fmt.Errorf("at %s: %s is out of the float64 range", at, x)
		}
		*data = append(*data, f)
		return nil
	case nil:
		return fmt.Errorf("at %s: expected a number, got null", at)
	default:
		return fmt.Errorf("at %s: expected a number or an array, got %T %v", at, v, v)
	}
}

// readCSV reads one sample per row. A first row with a field that is not a
// number is a header.
func readCSV(raw []byte, spec inputSpec) (*batch, error) {
	r := csv.NewReader(bytes.NewReader(raw))
	r.FieldsPerRecord = -1
	r.TrimLeadingSpace = true
	r.ReuseRecord = false
	rows, err := r.ReadAll()
	if err != nil {
		return nil, fmt.Errorf("reading CSV: %w", err)
	}
	var header []string
	if len(rows) > 0 {
		for _, f := range rows[0] {
			if _, err := strconv.ParseFloat(strings.TrimSpace(f), 64); err != nil {
				header = rows[0]
				rows = rows[1:]
				break
			}
		}
	}
	if len(rows) == 0 {
		return nil, fmt.Errorf("expected at least one row of numbers, got none")
	}
	width := len(rows[0])
	if header != nil {
		width = len(header)
	}
	ps, ok := spec.perSample()
	if ok && fullyKnown(ps) {
		width = product(ps)
	}
	if header != nil && len(header) != width {
		return nil, fmt.Errorf("header has %d names, expected %d (one per value of a sample of shape %s)", len(header), width, shapeString(ps))
	}
	data := make([]float64, 0, width*len(rows))
	line := 1
	if header != nil {
		line = 2
	}
	var bad map[int]error
	for i, row := range rows {
		err := parseCSVRow(row, width, line+i, i, &data)
		if err != nil {
			if bad == nil {
				bad = map[int]error{}
			}
			bad[i] = err
			data = data[:i*width]
			for j := 0; j < width; j++ {
				data = append(data, math.NaN())
			}
		}
	}
	if len(bad) == len(rows) {
		return nil, bad[0]
	}
	sample := ps
	if !ok || !fullyKnown(ps) {
		sample = []int{width}
		if ok && len(ps) != 1 {
			return nil, fmt.Errorf("expected samples of shape %s, which a CSV row of %d values cannot fill", shapeString(ps), width)
		}
	}
	b := &batch{Shape: append([]int{len(rows)}, sample...), Data: data, Samples: len(rows), Bad: bad}
	if header != nil {
		b.Features = make([]string, len(header))
		for i, h := range header {
			b.Features[i] = strings.TrimSpace(h)
		}
	}
	return b, nil
}

// parseCSVRow appends the width values of one CSV row to data. A row that
// is not width numbers is an error naming its line and sample.
func parseCSVRow(row []string, width, line, sample int, data *[]float64) error {
	if len(row) != width {
		return fmt.Errorf("line %d (sample %d): expected %d values, got %d", line, sample, width, len(row))
	}
	for j, f := range row {
		v, err := strconv.ParseFloat(strings.TrimSpace(f), 64)
		if err != nil {
			return fmt.Errorf("line %d (sample %d), field %d: %q is not a number", line, sample, j, f)
		}
		*data = append(*data, v)
	}
	return nil
}

// toTensor turns a batch into a tensor of the spec's element type.
func (b *batch) toTensor(spec inputSpec) (*onnxlite.Tensor, error) {
	if b.Tensor != nil {
		return b.Tensor, nil
	}
	dims := make([]int64, len(b.Shape))
	for i, d := range b.Shape {
		dims[i] = int64(d)
	}
	t := &onnxlite.Tensor{Name: spec.Name, DType: spec.Elem, Dims: dims}
	switch spec.Elem {
	case onnxlite.Float, onnxlite.Undefined:
		t.DType = onnxlite.Float
		out := make([]float32, len(b.Data))
		for i, v := range b.Data {
			out[i] = float32(v)
		}
		t.Data = out
	case onnxlite.Double:
		t.Data = append([]float64(nil), b.Data...)
	case onnxlite.Int64, onnxlite.Int32:
		ints := make([]int64, len(b.Data))
		for i, v := range b.Data {
			if v != math.Trunc(v) {
				return nil, fmt.Errorf("input %q is %s: value %v at position %d is not an integer", spec.Name, typeName(spec.Elem), v, i)
			}
			ints[i] = int64(v)
		}
		if spec.Elem == onnxlite.Int64 {
			t.Data = ints
		} else {
			i32 := make([]int32, len(ints))
			for i, v := range ints {
				i32[i] = int32(v)
			}
			t.Data = i32
		}
	default:
		return nil, fmt.Errorf("input %q is %s: only float32, float64, int32 and int64 inputs can be read from .npy, .json or .csv; use a .pb tensor", spec.Name, typeName(spec.Elem))
	}
	return t, nil
}

// safeCall runs f and turns a panic in a dependency into an error.
func safeCall(f func() error) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("internal error: %v", r)
		}
	}()
	return f()
}
