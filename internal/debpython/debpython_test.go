package debpython

import (
	"os/exec"
	"testing"

	"github.com/stretchr/testify/require"
)

// TestRequireRunsTheReference checks that the interpreter Require hands out
// runs the ONNX project's own checker: onnx.checker accepts a model made
// with onnx.helper and rejects one whose node reads an undefined value.
func TestRequireRunsTheReference(t *testing.T) {
	py := Require(t, "onnx")
	script := `
import onnx
from onnx import helper, TensorProto
x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1])
y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1])
ok = helper.make_model(helper.make_graph([helper.make_node("Relu", ["x"], ["y"])], "g", [x], [y]))
onnx.checker.check_model(ok)
bad = helper.make_model(helper.make_graph([helper.make_node("Relu", ["missing"], ["y"])], "g", [x], [y]))
try:
    onnx.checker.check_model(bad)
    print("accepted")
except onnx.checker.ValidationError:
    print("rejected")
`
	out, err := exec.Command(py, "-c", script).CombinedOutput()
	require.NoError(t, err, "%s", out)
	require.Equal(t, "rejected\n", string(out))
}
