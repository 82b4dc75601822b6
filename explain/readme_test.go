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

	"github.com/apportion/apportion/internal/testfiles"
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

	code := testfiles.ReadmeCode(t, "../README.md", "Using the library", "go")
	assert.Equal(t, body, strings.TrimRight(code, "\n"), "README's snippet vs func Example in explain/example_test.go")
}
