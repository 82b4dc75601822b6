package fidelity

import (
	"os/exec"
	"strings"
	"testing"
)

// fidelity is engine-agnostic: by the go command's own account of its
// dependencies (go list -deps), it imports neither onnxlite nor nn.
func TestEngineAgnostic(t *testing.T) {
	out, err := exec.Command("go", "list", "-deps", ".").Output()
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range strings.Fields(string(out)) {
		if strings.HasPrefix(p, "github.com/apportion/apportion/onnxlite") || strings.HasPrefix(p, "github.com/apportion/apportion/nn") {
			t.Errorf("fidelity depends on %s", p)
		}
	}
}
