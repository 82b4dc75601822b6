// Command zoo writes the benchmark models of package bench as ONNX files,
// one per model, into a directory (default bench/models):
//
//	go run ./bench/zoo [-dir bench/models]
//
// The weights are seeded, so the files are the same on every run.
package main

import (
	"bytes"
	"flag"
	"fmt"
	"os"
	"path/filepath"

	"github.com/apportion/apportion/bench"
	"github.com/apportion/apportion/onnxlite"
)

func main() {
	dir := flag.String("dir", filepath.Join("bench", "models"), "output directory")
	flag.Parse()
	if err := run(*dir); err != nil {
		fmt.Fprintln(os.Stderr, "zoo:", err)
		os.Exit(1)
	}
}

func run(dir string) error {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return err
	}
	for _, s := range bench.All {
		m, err := bench.Build(s)
		if err != nil {
			return err
		}
		var buf bytes.Buffer
		if err := onnxlite.Encode(&buf, m); err != nil {
			return fmt.Errorf("%s: %w", s.Name, err)
		}
		path := filepath.Join(dir, s.Name+".onnx")
		if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
			return err
		}
		fl, err := bench.FLOPs(m, s.Input)
		if err != nil {
			return err
		}
		fmt.Printf("%s\t%d bytes\t%d FLOPs/sample forward\t%s\n", path, buf.Len(), fl, s.Summary)
	}
	return nil
}
