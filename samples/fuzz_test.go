package samples_test

import (
	"bytes"
	"errors"
	"io"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// fuzzSpecs are the inputs every fuzzed file is read for: a fixed float32
// sample with named features, a rank-3 sample, an open dimension, no declared
// shape, and scalar samples.
var fuzzSpecs = []struct {
	spec     samples.Spec
	features []string
}{
	{samples.Spec{Name: "x", Elem: onnxlite.Float, Shape: []int{-1, 8}, HasShape: true}, []string{"a", "b", "c", "d", "e", "f", "g", "h"}},
	{samples.Spec{Name: "x", Shape: []int{-1, 2, 4}, HasShape: true}, nil},
	{samples.Spec{Name: "x", Shape: []int{-1, -1}, HasShape: true}, nil},
	{samples.Spec{Name: "x"}, nil},
	{samples.Spec{Name: "x", Shape: []int{-1}, HasShape: true}, nil},
}

// addSeeds adds the committed seed files of one extension.
func addSeeds(f *testing.F, ext string) {
	seeds, err := filepath.Glob(filepath.Join("testdata", "fuzz-seeds", "*"+ext))
	if err != nil || len(seeds) == 0 {
		f.Fatalf("no seed files *%s in testdata/fuzz-seeds", ext)
	}
	for _, s := range seeds {
		b, err := os.ReadFile(s)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
}

// fuzzRead reads data as a file called name for every fuzz spec. No read
// may panic; a batch read must be consistent (its shape, values and bad
// samples agree), and reading it as a stream three samples at a time must
// give what reading it whole gives.
func fuzzRead(t *testing.T, name string, data []byte) {
	for _, c := range fuzzSpecs {
		opt := samples.Options{KeepBad: true, Features: c.features, MaxSamples: 1000}
		whole, err := samples.Read(bytes.NewReader(data), name, c.spec, opt)
		if err != nil {
			if errors.Is(err, samples.ErrTooMany) {
				continue
			}
			if !strings.HasPrefix(err.Error(), "input "+name) {
				t.Fatalf("error does not name the file: %v", err)
			}
			continue
		}
		checkBatch(t, whole)
		if _, err := whole.ToTensor(c.spec); err != nil && whole.Tensor != nil {
			t.Fatalf("a .pb tensor does not convert: %v", err)
		}
		s, err := samples.NewStream(bytes.NewReader(data), name, c.spec, opt)
		if err != nil {
			t.Fatalf("read whole, but the stream does not start: %v", err)
		}
		got, bad, err := drain(t, s, 3)
		if err != nil {
			t.Fatalf("read whole, but the stream fails: %v", err)
		}
		wantBad := map[int]string{}
		for i, e := range whole.Bad {
			wantBad[i] = e.Error()
		}
		if !sameFloats(got, whole.Data) || !reflect.DeepEqual(bad, wantBad) {
			t.Fatalf("the stream read %d values and bad samples %v, the whole file %d and %v", len(got), bad, len(whole.Data), wantBad)
		}
	}
}

// drain reads the rest of s, n samples at a time, checking each batch, and
// returns the values and the errors of the bad samples by index.
func drain(t *testing.T, s *samples.Stream, n int) ([]float64, map[int]string, error) {
	var got []float64
	bad := map[int]string{}
	for {
		b, err := s.Next(n)
		if err == io.EOF {
			return got, bad, nil
		}
		if err != nil {
			return nil, nil, err
		}
		checkBatch(t, b)
		for i, e := range b.Bad {
			bad[b.First+i] = e.Error()
		}
		got = append(got, b.Data...)
	}
}

func checkBatch(t *testing.T, b *samples.Batch) {
	t.Helper()
	if b.Samples < 1 || len(b.Shape) == 0 && b.Samples != 1 || len(b.Shape) > 0 && b.Shape[0] != b.Samples {
		t.Fatalf("batch of %d samples has shape %v", b.Samples, b.Shape)
	}
	if len(b.Data) != b.Samples*samples.Product(b.SampleShape()) {
		t.Fatalf("batch of %d samples of shape %v holds %d values", b.Samples, b.SampleShape(), len(b.Data))
	}
	for i := range b.Bad {
		if i < 0 || i >= b.Samples {
			t.Fatalf("bad sample %d of %d", i, b.Samples)
		}
	}
}

// sameFloats compares values bit for bit (NaN marks bad samples).
func sameFloats(a, b []float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float64bits(a[i]) != math.Float64bits(b[i]) {
			return false
		}
	}
	return true
}

// FuzzReadCSV reads arbitrary bytes as a CSV file of samples and as a
// table with a group column.
func FuzzReadCSV(f *testing.F) {
	addSeeds(f, ".csv")
	f.Fuzz(func(t *testing.T, data []byte) {
		fuzzRead(t, "f.csv", data)
		tbl, err := samples.ReadTable(bytes.NewReader(data), "t.csv", samples.Spec{},
			samples.TableOptions{Features: fuzzSpecs[0].features, Size: 8, Group: "g"})
		if err != nil {
			return
		}
		for _, r := range tbl.Rows {
			if (r.Err == nil) != (len(r.Values) == len(tbl.Columns)) {
				t.Fatalf("row %s: %d values for %d columns, error %v", r.Where, len(r.Values), len(tbl.Columns), r.Err)
			}
		}
	})
}

// FuzzReadJSON reads arbitrary bytes as a JSON file of samples.
func FuzzReadJSON(f *testing.F) {
	addSeeds(f, ".json")
	f.Fuzz(func(t *testing.T, data []byte) { fuzzRead(t, "f.json", data) })
}

// FuzzReadNPY reads arbitrary bytes as a .npy file of samples.
func FuzzReadNPY(f *testing.F) {
	addSeeds(f, ".npy")
	f.Fuzz(func(t *testing.T, data []byte) { fuzzRead(t, "f.npy", data) })
}

// FuzzReadPB reads arbitrary bytes as an ONNX TensorProto of samples.
func FuzzReadPB(f *testing.F) {
	addSeeds(f, ".pb")
	f.Fuzz(func(t *testing.T, data []byte) { fuzzRead(t, "f.pb", data) })
}
