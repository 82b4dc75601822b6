package gradattr_test

import (
	"bytes"
	"os"
	"path/filepath"
	"testing"

	"github.com/apportion/apportion/gradattr"
)

// smallSummary is a summary of two features and two replicates over the
// rows first, first+1, ... of attrs, grouped by groups[i] ("" for none).
func smallSummary(f *testing.F, first uint64, attrs [][]float64, groups []string) []byte {
	s, err := gradattr.NewSummary(gradattr.SummaryOptions{
		Features: []string{"a", "b"}, Model: "m", Method: gradattr.MethodIntegratedGradients,
		Settings: map[string]any{"steps": 8}, GroupBy: "g", Bootstrap: 2, Seed: 1,
	})
	if err != nil {
		f.Fatal(err)
	}
	for i, a := range attrs {
		if err := s.Add(first+uint64(i), groups[i], a); err != nil {
			f.Fatal(err)
		}
	}
	if err := s.Skip(first+uint64(len(attrs)), groups[0], os.ErrNotExist); err != nil {
		f.Fatal(err)
	}
	raw, err := s.MarshalJSON()
	if err != nil {
		f.Fatal(err)
	}
	return raw
}

// FuzzSummaryMerge decodes two summary documents and merges them, as
// summarize -merge does. Nothing may panic; a summary that decodes encodes
// back to the same bytes; two that merge merge the same either way round,
// into a summary that encodes and decodes.
func FuzzSummaryMerge(f *testing.F) {
	seeds, _ := filepath.Glob(filepath.Join("testdata", "fuzz-seeds", "*.json"))
	var raws [][]byte
	for _, s := range seeds {
		b, err := os.ReadFile(s)
		if err != nil {
			f.Fatal(err)
		}
		raws = append(raws, b)
	}
	if len(raws) < 3 {
		f.Fatalf("expected the seed summaries in testdata/fuzz-seeds, got %d", len(raws))
	}
	for _, a := range raws {
		for _, b := range raws {
			f.Add(a, b)
		}
	}
	// Small summaries with sums that need low-order parts (1e16 + 1 is
	// not a float64) and one that overlaps the other's keys.
	a := smallSummary(f, 0, [][]float64{{1e16, -1}, {1, 0.1}}, []string{"x", "y"})
	b := smallSummary(f, 3, [][]float64{{0.3, 2}}, []string{"x"})
	c := smallSummary(f, 1, [][]float64{{5, 5}}, []string{"z"})
	f.Add(a, b)
	f.Add(a, c)

	f.Fuzz(func(t *testing.T, a, b []byte) {
		sa := decodeStable(t, a)
		sb := decodeStable(t, b)
		if sa == nil || sb == nil {
			return
		}
		ab, ba := decodeStable(t, mustJSON(t, sa)), decodeStable(t, mustJSON(t, sb))
		errAB, errBA := ab.Merge(sb), ba.Merge(sa)
		if (errAB == nil) != (errBA == nil) {
			t.Fatalf("merging one way: %v; the other: %v", errAB, errBA)
		}
		if errAB != nil {
			return
		}
		if !bytes.Equal(mustJSON(t, ab), mustJSON(t, ba)) {
			t.Fatal("a merged with b differs from b merged with a")
		}
		if ab.Rows() != sa.Rows()+sb.Rows() || ab.SkippedRows() != sa.SkippedRows()+sb.SkippedRows() {
			t.Fatalf("merged %d and %d rows into %d", sa.Rows(), sb.Rows(), ab.Rows())
		}
		decodeStable(t, mustJSON(t, ab))
	})
}

// decodeStable decodes raw; when it decodes, its statistics compute and it
// encodes to bytes that decode and encode to the same bytes again.
func decodeStable(t *testing.T, raw []byte) *gradattr.Summary {
	s, err := gradattr.DecodeSummary(bytes.NewReader(raw))
	if err != nil {
		return nil
	}
	s.Overall().Ranked()
	s.Groups()
	once := mustJSON(t, s)
	again, err := gradattr.DecodeSummary(bytes.NewReader(once))
	if err != nil {
		t.Fatalf("an encoded summary does not decode: %v", err)
	}
	if !bytes.Equal(once, mustJSON(t, again)) {
		t.Fatal("a summary encodes differently after a round trip")
	}
	return s
}

func mustJSON(t *testing.T, s *gradattr.Summary) []byte {
	raw, err := s.MarshalJSON()
	if err != nil {
		t.Fatalf("a decoded summary does not encode: %v", err)
	}
	return raw
}
