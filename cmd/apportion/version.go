package main

import (
	"fmt"
	"io"
	"runtime"
	"runtime/debug"

	"github.com/apportion/apportion/nn"
)

func runVersion(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("version", "", "apportion version",
		"Prints the module's version (\"(devel)\" for a build from a checkout), the Go\n"+
			"version and platform it was built with, the kernels it runs on this CPU\n"+
			"(AVX2/FMA assembly or portable Go) and, when the binary records them, the\n"+
			"revision and time of the source it was built from.", stderr)
	if code, done := parseFlags(fs, args, stdout); done {
		return code
	}
	bi, _ := debug.ReadBuildInfo()
	for _, line := range versionLines(bi, nn.Kernels()) {
		fmt.Fprintln(stdout, line)
	}
	return exitOK
}

// versionLines describes the build bi (nil when the binary records none)
// running the given kernels; the revision line comes from the version
// control settings the go command stamps (vcs, vcs.revision, vcs.time,
// vcs.modified: runtime/debug.BuildSetting).
func versionLines(bi *debug.BuildInfo, kernels string) []string {
	path, version := "github.com/apportion/apportion", "(unknown)"
	vcs := map[string]string{}
	if bi != nil {
		if bi.Main.Path != "" {
			path = bi.Main.Path
		}
		if bi.Main.Version != "" {
			version = bi.Main.Version
		}
		for _, s := range bi.Settings {
			vcs[s.Key] = s.Value
		}
	}
	lines := []string{
		"apportion " + version,
		"module    " + path,
		fmt.Sprintf("go        %s %s/%s", runtime.Version(), runtime.GOOS, runtime.GOARCH),
		"kernels   " + kernels,
	}
	if rev := vcs["vcs.revision"]; rev != "" {
		line := "revision  " + vcs["vcs"] + " " + rev
		if t := vcs["vcs.time"]; t != "" {
			line += " " + t
		}
		if vcs["vcs.modified"] == "true" {
			line += " (with uncommitted changes)"
		}
		lines = append(lines, line)
	}
	return lines
}
