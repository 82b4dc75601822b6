package main

import (
	"os"
	"runtime"
	"runtime/debug"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestVersion(t *testing.T) {
	code, out, errs := cli(t, "version")
	require.Equal(t, exitOK, code, errs)
	lines := strings.Split(strings.TrimSpace(out), "\n")
	require.GreaterOrEqual(t, len(lines), 4, out)
	assert.True(t, strings.HasPrefix(lines[0], "apportion "), out)
	assert.Equal(t, "module    github.com/apportion/apportion", lines[1], "go.mod's module path")
	assert.Equal(t, "go        "+runtime.Version()+" "+runtime.GOOS+"/"+runtime.GOARCH, lines[2])

	// The kernels against the CPU's own report: Linux lists the avx2 and
	// fma flags in /proc/cpuinfo (proc(5)) when the CPU has them.
	if raw, err := os.ReadFile("/proc/cpuinfo"); err == nil && runtime.GOARCH == "amd64" {
		flags := strings.Fields(strings.SplitN(strings.SplitN(string(raw), "\nflags\t\t: ", 2)[1], "\n", 2)[0])
		has := map[string]bool{}
		for _, f := range flags {
			has[f] = true
		}
		want := "portable Go"
		if has["avx2"] && has["fma"] && !goldenPortable {
			want = "AVX2/FMA assembly"
		}
		assert.Equal(t, "kernels   "+want, lines[3])
	}

	// A binary stamped by the go command from a repository names its
	// revision (runtime/debug.BuildSetting keys).
	bi := &debug.BuildInfo{Main: debug.Module{Path: "github.com/apportion/apportion", Version: "v0.4.0"}, Settings: []debug.BuildSetting{
		{Key: "vcs", Value: "git"}, {Key: "vcs.revision", Value: "0123abcd"},
		{Key: "vcs.time", Value: "2026-11-02T10:00:00Z"}, {Key: "vcs.modified", Value: "true"},
	}}
	got := versionLines(bi, "portable Go")
	assert.Equal(t, "apportion v0.4.0", got[0])
	assert.Equal(t, "revision  git 0123abcd 2026-11-02T10:00:00Z (with uncommitted changes)", got[4])
	assert.Len(t, versionLines(nil, "portable Go"), 4)

	code, out, _ = cli(t, "help")
	require.Equal(t, exitOK, code)
	assert.Contains(t, out, "\tversion ")
}
