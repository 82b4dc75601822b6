package summarize

import (
	"fmt"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"
	"time"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/testing/ptest"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
)

// BenchmarkPipeline measures rows explained per second by one worker: the
// pipeline on prism in this process, whose one loopback worker has
// GOMAXPROCS cores, start-up and the combine included. pumps: the demo's
// 500 held-out rows four times over (2000 rows, 8 files, keyed), the
// demo's settings (integrated gradients, automatic points, against the
// mean of the reference set), by pump_line. welds: the 200 held-out
// 1×32×32 patches (.npy), integrated gradients with 32 Gauss–Legendre
// points against the mean clean patch, by predicted class.
func BenchmarkPipeline(b *testing.B) {
	b.Run("pumps", func(b *testing.B) {
		raw, err := demo.File("pumps_test.csv")
		if err != nil {
			b.Fatal(err)
		}
		lines := strings.Split(strings.TrimRight(string(raw), "\n"), "\n")
		dir := b.TempDir()
		n := 0
		for k := range 8 {
			var part []string
			for rep := range 4 {
				for i := k; i < len(lines)-1; i += 8 {
					part = append(part, fmt.Sprintf("%d-%d,%s", rep, i, lines[1+i]))
					n++
				}
			}
			text := "reading," + lines[0] + "\n" + strings.Join(part, "\n") + "\n"
			if err := os.WriteFile(filepath.Join(dir, fmt.Sprintf("part-%d.csv", k)), []byte(text), 0o644); err != nil {
				b.Fatal(err)
			}
		}
		s, err := demo.Get("pumps")
		if err != nil {
			b.Fatal(err)
		}
		cfg := Config{Model: s.Model, ModelName: "pumps.onnx", By: "pump_line", Key: "reading", Seed: 1,
			Settings:  []Setting{{explain.FieldBaseline, "mean"}, {explain.FieldReference, "reference.csv"}},
			Reference: &File{Name: "reference.csv", Data: s.Reference}}
		benchPipeline(b, cfg, filepath.Join(dir, "part-*.csv"), n)
	})
	b.Run("welds", func(b *testing.B) {
		s, err := demo.Get("welds")
		if err != nil {
			b.Fatal(err)
		}
		patches, err := demo.File("welds_test_patches.npy")
		if err != nil {
			b.Fatal(err)
		}
		dir := b.TempDir()
		if err := os.WriteFile(filepath.Join(dir, "patches.npy"), patches, 0o644); err != nil {
			b.Fatal(err)
		}
		cfg := Config{Model: s.Model, ModelName: "welds.onnx", By: ByPredicted, Seed: 1,
			Settings: []Setting{{explain.FieldBaseline, "mean"}, {explain.FieldReference, s.ReferenceFile},
				{explain.FieldSteps, "32"}, {explain.FieldRule, "gauss-legendre"}},
			Reference: &File{Name: s.ReferenceFile, Data: s.Reference}}
		benchPipeline(b, cfg, filepath.Join(dir, "patches.npy"), 200) // README: 200 held-out patches
	})
}

func benchPipeline(b *testing.B, cfg Config, glob string, rows int) {
	files, err := filepath.Glob(glob)
	if err != nil || len(files) == 0 {
		b.Fatal(glob, err)
	}
	f, err := os.Open(files[0])
	if err != nil {
		b.Fatal(err)
	}
	p, err := NewPlan(cfg, f, files[0])
	f.Close()
	if err != nil {
		b.Fatal(err)
	}
	out := filepath.Join(b.TempDir(), "summary.json")
	b.ResetTimer()
	start := time.Now()
	for range b.N {
		pipe, s := beam.NewPipelineWithRoot()
		summary, _ := Files(s, p, glob)
		Write(s, out, summary)
		if _, err := ptest.RunWithMetrics(pipe); err != nil {
			b.Fatal(err)
		}
	}
	elapsed := time.Since(start)
	b.ReportMetric(float64(rows*b.N)/elapsed.Seconds(), "rows/s")
	b.ReportMetric(float64(runtime.GOMAXPROCS(0)), "cores")
}
