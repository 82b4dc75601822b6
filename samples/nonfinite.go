package samples

import "fmt"

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
