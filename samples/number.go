package samples

import (
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
)

// errNotNumber is the error of text that is not a number in decimal
// notation; callers quote the text.
var errNotNumber = errors.New("not a number")

// RangeError is a number written in decimal notation whose value a float64
// cannot hold: beyond ±1.8e308 (Overflow), or so close to zero that it
// would read as 0 (below 4.9e-324, the smallest subnormal; IEEE 754
// binary64).
type RangeError struct {
	// Text is the number as written.
	Text     string
	Overflow bool
}

func (e *RangeError) Error() string {
	if e.Overflow {
		return fmt.Sprintf("%s is out of the float64 range (larger than 1.8e308 in magnitude)", e.Text)
	}
	return fmt.Sprintf("%s is out of the float64 range (smaller than 4.9e-324 in magnitude, it would read as 0)", e.Text)
}

// parseDecimal reads a number in decimal notation: an optional sign,
// digits with an optional decimal point, and an optional exponent ("12",
// "-0.5", ".5", "3.", "1e-3"), or one of the words NaN, Inf and Infinity in
// any case and with a sign, which callers refuse as not finite by name.
// With strictJSON the number must follow JSON's grammar (RFC 8259,
// section 6: no "+", no leading zeros, digits on both sides of the point)
// and the words are refused. Hexadecimal floats and digit separators
// ("0x1p-2", "1_000"), which strconv.ParseFloat also accepts, are not
// numbers here. A value a float64 cannot hold is a *RangeError. s does not
// escape, so a caller's string(bytes) costs no allocation.
func parseDecimal(s string, strictJSON bool) (float64, error) {
	if !strictJSON && isNonFiniteWord(s) {
		return strconv.ParseFloat(s, 64)
	}
	if !decimalSyntax(s, strictJSON) {
		return 0, errNotNumber
	}
	v, err := strconv.ParseFloat(s, 64)
	switch {
	case err != nil || math.IsInf(v, 0):
		return 0, &RangeError{Text: strings.Clone(s), Overflow: true}
	case v == 0 && nonzeroMantissa(s):
		return 0, &RangeError{Text: strings.Clone(s)}
	}
	return v, nil
}

// isNumber reports whether s is a number for parseDecimal, in range or not.
func isNumber(s string) bool {
	_, err := parseDecimal(s, false)
	return !errors.Is(err, errNotNumber)
}

// isNonFiniteWord reports whether s is NaN or an infinity as strconv spells
// them: "nan", "inf", "infinity" in any case, the infinities signed.
func isNonFiniteWord(s string) bool {
	t := strings.ToLower(strings.TrimLeft(s, "+-"))
	if len(s)-len(t) > 1 {
		return false
	}
	return t == "inf" || t == "infinity" || (t == "nan" && len(t) == len(s))
}

// decimalSyntax reports whether s is [sign] digits [. digits] [e [sign]
// digits], with at least one digit before the exponent; strictJSON applies
// JSON's grammar.
func decimalSyntax(s string, strictJSON bool) bool {
	i := 0
	if i < len(s) && (s[i] == '-' || (s[i] == '+' && !strictJSON)) {
		i++
	}
	intStart := i
	for i < len(s) && isDigit(s[i]) {
		i++
	}
	intDigits := i - intStart
	if strictJSON && (intDigits == 0 || (intDigits > 1 && s[intStart] == '0')) {
		return false
	}
	fracDigits := 0
	if i < len(s) && s[i] == '.' {
		i++
		start := i
		for i < len(s) && isDigit(s[i]) {
			i++
		}
		fracDigits = i - start
		if strictJSON && fracDigits == 0 {
			return false
		}
	}
	if intDigits+fracDigits == 0 {
		return false
	}
	if i < len(s) && (s[i] == 'e' || s[i] == 'E') {
		i++
		if i < len(s) && (s[i] == '+' || s[i] == '-') {
			i++
		}
		start := i
		for i < len(s) && isDigit(s[i]) {
			i++
		}
		if i == start {
			return false
		}
	}
	return i == len(s)
}

// nonzeroMantissa reports whether the digits of s before its exponent
// hold one that is not 0: a value that reads as 0 is then an underflow.
func nonzeroMantissa(s string) bool {
	for i := 0; i < len(s); i++ {
		switch c := s[i]; {
		case c == 'e' || c == 'E':
			return false
		case c >= '1' && c <= '9':
			return true
		}
	}
	return false
}

func isDigit(c byte) bool { return c >= '0' && c <= '9' }
