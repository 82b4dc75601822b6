package explain

import (
	"errors"
	"strings"

	"github.com/apportion/apportion/nn"
)

// requestError is an engine error about the sample itself (an index out of
// range, a value of the wrong kind): it says what the engine said about
// the sample, without the layers of context the engine and the methods
// wrapped around it, and still matches nn.ErrBadRequest and the rest of
// the chain with errors.Is.
type requestError struct {
	msg string
	err error
}

func (e *requestError) Error() string { return e.msg }
func (e *requestError) Unwrap() error { return e.err }

// UserError returns err as the user should read it: for an engine error
// about the sample (nn.ErrBadRequest), "the model cannot run this input: "
// and what the engine said about it; any other error unchanged.
func UserError(err error) error {
	var done *requestError
	if err == nil || !errors.Is(err, nn.ErrBadRequest) || errors.As(err, &done) {
		return err
	}
	s := err.Error()
	marker := nn.ErrBadRequest.Error() + ": "
	i := strings.LastIndex(s, marker)
	if i < 0 {
		return err
	}
	return &requestError{msg: "the model cannot run this input: " + s[i+len(marker):], err: err}
}
