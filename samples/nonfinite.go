package samples

import (
	"encoding/json"
	"errors"
	"fmt"
	"strings"
)

// NonFiniteTokenError is a NaN or Infinity token in JSON: some encoders
// write them, but JSON has no such numbers, and a model cannot be explained
// at one. It wraps ErrNonFinite.
type NonFiniteTokenError struct {
	// Token is "NaN" or "Infinity"; Offset is the byte it starts at.
	Token  string
	Offset int64
}

func (e *NonFiniteTokenError) Error() string {
	return fmt.Sprintf("%s at byte %d: expected finite numbers, got a value that is not a finite number (JSON has no NaN or Infinity, and a model cannot be explained at one)", e.Token, e.Offset)
}

func (e *NonFiniteTokenError) Unwrap() error { return ErrNonFinite }

// nonFiniteJSON turns a JSON syntax error at a NaN or Infinity token into a
// NonFiniteTokenError; other errors are returned as they are.
func nonFiniteJSON(err error) error {
	var se *json.SyntaxError
	if !errors.As(err, &se) {
		return err
	}
	// encoding/json reports the token's first letter: "invalid character
	// 'N' looking for beginning of value", "invalid character 'I' in
	// numeric literal" (after a minus sign).
	for _, tok := range []string{"NaN", "Infinity"} {
		if strings.Contains(se.Error(), "invalid character '"+tok[:1]+"'") {
			return &NonFiniteTokenError{Token: tok, Offset: se.Offset}
		}
	}
	return err
}
