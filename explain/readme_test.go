package explain_test

import (
	"go/ast"
	"go/parser"
	"go/token"
	"os"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestReadmeShowsExample checks that the README's "Using the library"
// snippet is the body of Example, which go test compiles and runs, so that
// the README's code cannot go stale.
func TestReadmeShowsExample(t *testing.T) {
	src, err := os.ReadFile("example_test.go")
	require.NoError(t, err)
	fset := token.NewFileSet()
	f, err := parser.ParseFile(fset, "example_test.go", src, parser.ParseComments)
	require.NoError(t, err)
	var body string
	for _, d := range f.Decls {
		fn, ok := d.(*ast.FuncDecl)
		if !ok || fn.Name.Name != "Example" {
			continue
		}
		from := fset.Position(fn.Body.Lbrace).Offset + 1
		to := fset.Position(fn.Body.Rbrace).Offset
		text := string(src[from:to])
		text = text[:strings.Index(text, "\t// Output:")] // the expected output is the test's, not the reader's
		var lines []string
		for _, l := range strings.Split(strings.Trim(text, "\n"), "\n") {
			lines = append(lines, strings.TrimPrefix(l, "\t"))
		}
		body = strings.Join(lines, "\n")
	}
	require.NotEmpty(t, body, "no func Example in example_test.go")

	readme, err := os.ReadFile("../README.md")
	require.NoError(t, err)
	_, section, ok := strings.Cut(string(readme), "\n## Using the library\n")
	require.True(t, ok, "README has no section Using the library")
	_, code, ok := strings.Cut(section, "```go\n")
	require.True(t, ok, "the section has no Go code")
	code, _, ok = strings.Cut(code, "```")
	require.True(t, ok)
	assert.Equal(t, body, strings.TrimRight(code, "\n"), "README's snippet vs func Example in explain/example_test.go")
}
