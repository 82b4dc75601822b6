// Package debpython finds, for tests only, Debian's python3 with the
// reference implementations the project checks against importable: the ONNX
// project's python package (python3-onnx 1.12.0), PyTorch (python3-torch
// 1.13.1) and matplotlib's copy of the ColorBrewer schemes
// (python3-matplotlib 3.6.3).
package debpython

import (
	"os"
	"os/exec"
	"strings"
	"testing"
)

// Path is Debian's python3: the Debian packages install their modules for
// it, and it may not be the first python3 on PATH.
const Path = "/usr/bin/python3"

// packages names the Debian package that installs each module.
var packages = map[string]string{
	"onnx":       "python3-onnx",
	"torch":      "python3-torch",
	"numpy":      "python3-numpy",
	"sklearn":    "python3-sklearn",
	"matplotlib": "python3-matplotlib",
}

// Require returns Path when it imports every one of modules. Otherwise the
// test is skipped with a message naming the Debian packages to install, or
// failed when CI=true (CI installs them).
func Require(t testing.TB, modules ...string) string {
	t.Helper()
	err := exec.Command(Path, "-c", "import "+strings.Join(modules, ", ")).Run()
	if err == nil {
		return Path
	}
	var pkgs []string
	for _, m := range modules {
		if p, ok := packages[m]; ok {
			pkgs = append(pkgs, p)
		} else {
			pkgs = append(pkgs, "the package providing "+m)
		}
	}
	msg := Path + " cannot import " + strings.Join(modules, ", ") + " (" + err.Error() + "): install the Debian packages " +
		strings.Join(pkgs, " ") + " (apt-get install -y " + strings.Join(pkgs, " ") + ")"
	if os.Getenv("CI") == "true" {
		t.Fatal(msg)
	}
	t.Skip(msg)
	return ""
}
