package samples

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"strconv"
	"strings"
)

// ReadJSON reads one JSON document of nested arrays of numbers: one
// sample, or an array of samples, of the declared per-sample shape (nested
// to it, or flat). An array of samples is read sample by sample, straight
// into float64 values (about 8 bytes per number, whatever the text), and
// when the per-sample shape is fully declared one malformed sample is
// marked bad in the batch and the others are kept.
func ReadJSON(r io.Reader, spec Spec) (*Batch, error) { return readAll(newJSONSource(r, spec)) }

// maxJSONDepth bounds the nesting of arrays in a samples file: a sample of
// the deepest rank .npy allows, in an array of samples, with room to spare.
const maxJSONDepth = 64

// jsonSource reads a JSON document of samples. In samples mode each
// element of the top-level array is one sample, read when asked for; a
// document that is one sample is read whole.
type jsonSource struct {
	sc   *jsonScanner
	spec Spec
	// ps is the declared per-sample shape (known: the rank is declared);
	// fixed is set when every dimension of it is.
	ps           []int
	known, fixed bool
	// sample is the shape of each sample in samples mode.
	sample []int
	// first is the first element, read to choose the mode; whole is the
	// batch of a document read whole; cur is the sample being read.
	first *jsonValue
	whole *Batch
	cur   jsonValue
	ended bool // the top-level array is closed
}

func newJSONSource(r io.Reader, spec Spec) (*jsonSource, error) {
	s := &jsonSource{sc: &jsonScanner{r: bufio.NewReaderSize(r, 64<<10)}, spec: spec}
	s.ps, s.known = spec.PerSample()
	s.fixed = s.known && fullyKnown(s.ps)
	c, err := s.sc.peek()
	if err == io.EOF {
		return nil, fmt.Errorf("reading JSON: expected an array of samples, got an empty file")
	}
	if err != nil {
		return nil, err
	}
	if c != '[' {
		// A bare number is one sample of rank 0; anything else is
		// refused by the same reading.
		return s, s.readWhole(nil)
	}
	s.sc.advance()
	if c, err = s.sc.peek(); err != nil {
		return nil, s.sc.syntax(err, "a sample or ]")
	}
	if c == ']' {
		s.sc.advance()
		s.ended = true
		return s, s.sc.end()
	}
	first := &jsonValue{}
	s.sc.path = append(s.sc.path[:0], 0)
	if err := s.sc.into(first, 0, 1); err != nil {
		return nil, err
	}
	switch {
	case !s.known && first.err == nil:
		s.sample = first.shape
	case !s.known:
		return nil, first.err
	case first.err == nil && matchesShape(first.shape, s.ps):
		s.sample = first.shape
	case s.fixed && first.err == nil && slices.Equal(first.shape, []int{Product(s.ps)}):
		s.sample = s.ps
	case first.err == nil && len(s.ps) > 0 && matchesShape(first.shape, s.ps[1:]), first.number:
		// The document is one sample, nested or flat.
		return s, s.readWhole(first)
	case s.fixed:
		s.sample = s.ps
	default:
		if first.err != nil {
			return nil, first.err
		}
		return nil, fmt.Errorf("expected samples of shape %s, got a first sample of shape %s", ShapeString(s.ps), ShapeString(first.shape))
	}
	s.first = first
	return s, nil
}

// readWhole reads the document as one value whose first element, already
// read, is first (nil when the document is not an array), and splits it
// into samples as the other formats are (see fitSamples).
func (s *jsonSource) readWhole(first *jsonValue) error {
	v := &jsonValue{}
	if first == nil {
		s.sc.path = s.sc.path[:0]
		if err := s.sc.into(v, 0, 0); err != nil {
			return err
		}
	} else {
		if first.err != nil {
			return first.err
		}
		v.shape, v.data = append([]int{-1}, first.shape...), first.data
		s.sc.path = s.sc.path[:0]
		if err := s.sc.elements(v, 0, 1, 1); err != nil {
			return err
		}
	}
	if v.err != nil {
		return v.err
	}
	if err := s.sc.end(); err != nil {
		return err
	}
	s.ended = true
	var err error
	s.whole, err = newBatch(v.shape, v.data, s.spec)
	return err
}

func (s *jsonSource) next(n, first int) (*Batch, error) {
	if s.whole != nil {
		b := s.whole
		s.whole = nil
		return b, nil
	}
	if s.ended {
		return nil, io.EOF
	}
	per := Product(s.sample)
	capacity := n * per
	if !s.fixed || capacity > 1<<20 {
		capacity = min(capacity, 1<<16)
	}
	b := &Batch{Data: make([]float64, 0, capacity)}
	for b.Samples < n && !s.ended {
		start := len(b.Data)
		v := s.first
		if v != nil {
			s.first = nil
			if v.err == nil {
				b.Data = append(b.Data, v.data...)
				v.data, v.base = b.Data, start
			}
		} else {
			c, err := s.sc.peek()
			if err != nil {
				return nil, s.sc.syntax(err, ", or ]")
			}
			s.sc.advance()
			if c == ']' {
				s.ended = true
				if err := s.sc.end(); err != nil {
					return nil, err
				}
				break
			}
			if c != ',' {
				return nil, s.sc.unexpected(c, ", or ]")
			}
			v = &s.cur
			v.shape, v.data, v.base, v.number, v.err = v.shape[:0], b.Data, start, false, nil
			s.sc.path = append(s.sc.path[:0], first+b.Samples)
			if err := s.sc.into(v, 0, 1); err != nil {
				return nil, err
			}
		}
		if err := s.check(v, per, first+b.Samples); err != nil {
			if !s.fixed {
				return nil, err
			}
			b.MarkBad(b.Samples, err)
			b.Data = appendNaN(b.Data[:start], per)
		} else {
			b.Data = v.data
		}
		b.Samples++
	}
	if b.Samples == 0 {
		return nil, io.EOF
	}
	b.Shape = append([]int{b.Samples}, s.sample...)
	return b, nil
}

// check says why v is not a sample of the stream's shape, or returns nil;
// i is its index. An error about the sample as a whole is a
// *wholeSampleError, which does not say where the sample is.
func (s *jsonSource) check(v *jsonValue, per, i int) error {
	got := len(v.data) - v.base
	switch {
	case v.err != nil:
		return v.err
	case got != per && s.fixed:
		return wholeSampleErrorf("expected %d values (shape %s), got %d (shape %s)", per, ShapeString(s.sample), got, ShapeString(v.shape))
	case slices.Equal(v.shape, s.sample), s.fixed && slices.Equal(v.shape, []int{per}):
		return nil
	case s.fixed:
		return wholeSampleErrorf("expected a sample of shape %s or %d flat values, got shape %s", ShapeString(s.sample), per, ShapeString(v.shape))
	}
	return wholeSampleErrorf("ragged array: expected a sample of shape %s, as the first, got shape %s", ShapeString(s.sample), ShapeString(v.shape))
}

// wholeSampleError is an error about a sample as a whole, whose index the
// caller gives: a batch's Bad is indexed by it, and a stream that stops at
// the first bad sample names it.
type wholeSampleError struct{ msg string }

func (e *wholeSampleError) Error() string { return e.msg }

func wholeSampleErrorf(format string, a ...any) error {
	return &wholeSampleError{fmt.Sprintf(format, a...)}
}

// matchesShape reports whether got fits want, where -1 in want matches any
// size.
func matchesShape(got, want []int) bool {
	if len(got) != len(want) {
		return false
	}
	for i := range want {
		if want[i] >= 0 && got[i] != want[i] {
			return false
		}
	}
	return true
}

// jsonValue is a JSON value read as nested arrays of numbers: its shape
// and values (appended to data), or err, the first reason it is not such
// an array (a null, a string, a ragged array, a number out of range), which
// costs the sample but not the document.
type jsonValue struct {
	shape []int
	// data holds the values from base on.
	data   []float64
	base   int
	number bool // the value is a number, not an array
	err    error
}

// jsonScanner reads JSON text (RFC 8259) from a buffered reader without
// holding more of it than one number. Positions in messages count bytes
// from 1.
type jsonScanner struct {
	r   *bufio.Reader
	off int64 // bytes consumed
	num []byte
	// path holds the indices from the top-level array down to the value
	// being read.
	path []int
}

// at names the value being read: [3][0], or the top level.
func (sc *jsonScanner) at() string {
	if len(sc.path) == 0 {
		return "the top level"
	}
	var b strings.Builder
	for _, i := range sc.path {
		b.WriteString("[" + strconv.Itoa(i) + "]")
	}
	return b.String()
}

// peek returns the next byte after white space, without consuming it.
func (sc *jsonScanner) peek() (byte, error) {
	for {
		c, err := sc.r.ReadByte()
		if err != nil {
			return 0, err
		}
		switch c {
		case ' ', '\t', '\n', '\r':
			sc.off++
			continue
		}
		sc.r.UnreadByte()
		return c, nil
	}
}

// advance consumes the byte peek returned.
func (sc *jsonScanner) advance() {
	sc.r.ReadByte()
	sc.off++
}

// end checks that nothing but white space follows the document.
func (sc *jsonScanner) end() error {
	if _, err := sc.peek(); err != io.EOF {
		if err != nil {
			return err
		}
		return fmt.Errorf("reading JSON: expected one array, got more data after it (at byte %d)", sc.off+1)
	}
	return nil
}

// syntax reports a read error: the end of the file where want was
// expected, or the reader's own error.
func (sc *jsonScanner) syntax(err error, want string) error {
	if err == io.EOF {
		return fmt.Errorf("reading JSON: expected %s at byte %d, got the end of the file", want, sc.off+1)
	}
	return err
}

func (sc *jsonScanner) unexpected(c byte, want string) error {
	return fmt.Errorf("reading JSON: expected %s at byte %d, got %q", want, sc.off+1, c)
}

// into reads one value, at sc.path, into v, where level is its level in v
// (0 for v itself) and depth its depth in the document.
func (sc *jsonScanner) into(v *jsonValue, level, depth int) error {
	c, err := sc.peek()
	if err != nil {
		return sc.syntax(err, "a value")
	}
	switch {
	case c == '[':
		if depth >= maxJSONDepth {
			return fmt.Errorf("reading JSON: arrays nested more than %d deep at byte %d", maxJSONDepth, sc.off+1)
		}
		sc.advance()
		switch {
		case v.err != nil:
		case level == len(v.shape) && len(v.data) == v.base && !v.number:
			v.shape = append(v.shape, -1) // the length, once known
		case level >= len(v.shape):
			v.fail("ragged array at %s: expected a number, got an array", sc.at())
		}
		return sc.elements(v, level, depth+1, 0)
	case c == '-' || isDigit(c):
		f, err := sc.number()
		if rerr, ok := err.(*RangeError); ok {
			if v.err == nil {
				v.fail("at %s: %v", sc.at(), rerr)
			}
			return nil
		}
		if err != nil {
			return err
		}
		switch {
		case v.err != nil:
		case level == 0:
			v.number = true
			v.data = append(v.data, f)
		case level != len(v.shape):
			v.fail("ragged array at %s: expected an array of %d elements, got a number", sc.at(), v.shape[level])
		default:
			v.data = append(v.data, f)
		}
		return nil
	}
	// Not a number or an array: the sample is bad if the document is
	// well-formed JSON.
	what, err := sc.skip(depth)
	if err != nil {
		return err
	}
	if v.err == nil {
		v.fail("at %s: expected a number, got %s", sc.at(), what)
	}
	return nil
}

// elements reads the elements of an array whose '[' is consumed, the
// array at level of v, after done elements already read.
func (sc *jsonScanner) elements(v *jsonValue, level, depth, done int) error {
	i := done
	sc.path = append(sc.path, 0)
	for {
		c, err := sc.peek()
		if err != nil {
			return sc.syntax(err, "a value, , or ]")
		}
		if c == ']' {
			sc.advance()
			break
		}
		if i > 0 {
			if c != ',' {
				return sc.unexpected(c, ", or ]")
			}
			sc.advance()
		}
		sc.path[len(sc.path)-1] = i
		if err := sc.into(v, level+1, depth); err != nil {
			return err
		}
		i++
	}
	sc.path = sc.path[:len(sc.path)-1]
	if v.err != nil {
		return nil
	}
	switch n := v.shape[level]; {
	case n < 0:
		v.shape[level] = i
	case n != i:
		v.fail("ragged array at %s: expected %d elements, got %d", sc.at(), n, i)
	}
	return nil
}

func (v *jsonValue) fail(format string, a ...any) { v.err = fmt.Errorf(format, a...) }

// number reads a JSON number; one out of the float64 range is returned
// with a *RangeError.
func (sc *jsonScanner) number() (float64, error) {
	sc.num = sc.num[:0]
	for {
		c, err := sc.r.ReadByte()
		if err != nil {
			break
		}
		if !isDigit(c) && c != '-' && c != '+' && c != '.' && c != 'e' && c != 'E' {
			sc.r.UnreadByte()
			break
		}
		if len(sc.num) > 1000 {
			return 0, fmt.Errorf("reading JSON: a number of more than 1000 characters at byte %d", sc.off+1)
		}
		sc.num = append(sc.num, c)
	}
	start := sc.off + 1
	sc.off += int64(len(sc.num))
	f, err := parseDecimal(string(sc.num), true)
	switch _, isRange := err.(*RangeError); {
	case isRange:
		return 0, err
	case err != nil && string(sc.num) == "-":
		if b, _ := sc.r.Peek(8); string(b) == "Infinity" {
			return 0, nonFiniteJSON("Infinity", start+1)
		}
		fallthrough
	case err != nil:
		return 0, fmt.Errorf("reading JSON: %q at byte %d is not a number", sc.num, start)
	}
	return f, nil
}

// skip reads a JSON value that is not a number or an array (a string, an
// object, true, false or null), checking its syntax, and names it.
func (sc *jsonScanner) skip(depth int) (string, error) {
	c, _ := sc.peek()
	switch c {
	case '"':
		return "a string", sc.skipString()
	case '{':
		if depth >= maxJSONDepth {
			return "", fmt.Errorf("reading JSON: values nested more than %d deep at byte %d", maxJSONDepth, sc.off+1)
		}
		sc.advance()
		for n := 0; ; n++ {
			c, err := sc.peek()
			if err != nil {
				return "", sc.syntax(err, "a key or }")
			}
			if c == '}' && n == 0 {
				sc.advance()
				return "an object", nil
			}
			if n > 0 {
				if c == '}' {
					sc.advance()
					return "an object", nil
				}
				if c != ',' {
					return "", sc.unexpected(c, ", or }")
				}
				sc.advance()
				if c, err = sc.peek(); err != nil {
					return "", sc.syntax(err, "a key")
				}
			}
			if c != '"' {
				return "", sc.unexpected(c, "a key")
			}
			if err := sc.skipString(); err != nil {
				return "", err
			}
			if c, err = sc.peek(); err != nil || c != ':' {
				if err != nil {
					return "", sc.syntax(err, ":")
				}
				return "", sc.unexpected(c, ":")
			}
			sc.advance()
			ignored := jsonValue{err: errIgnored}
			if err := sc.into(&ignored, 0, depth+1); err != nil {
				return "", err
			}
		}
	}
	for _, lit := range []string{"null", "true", "false"} {
		if b, _ := sc.r.Peek(len(lit)); string(b) == lit {
			sc.r.Discard(len(lit))
			sc.off += int64(len(lit))
			if lit == "null" {
				return "null", nil
			}
			return "a boolean", nil
		}
	}
	for _, word := range []string{"NaN", "Infinity"} {
		if b, _ := sc.r.Peek(len(word)); string(b) == word {
			return "", nonFiniteJSON(word, sc.off+1)
		}
	}
	return "", sc.unexpected(c, "a value")
}

// nonFiniteJSON is the error of a NaN or Infinity token (word) whose
// first letter is byte off, which some encoders write but JSON does not
// have.
func nonFiniteJSON(word string, off int64) error {
	return fmt.Errorf("reading JSON: %w", &NonFiniteTokenError{Token: word, Offset: off})
}

// errIgnored marks a value read only for its syntax.
var errIgnored = errors.New("ignored")

// skipString reads a JSON string, escapes included.
func (sc *jsonScanner) skipString() error {
	start := sc.off + 1
	sc.advance() // the opening quote
	for {
		c, err := sc.r.ReadByte()
		if err != nil {
			return fmt.Errorf("reading JSON: the string at byte %d is not closed", start)
		}
		sc.off++
		switch {
		case c == '"':
			return nil
		case c == '\\':
			e, err := sc.r.ReadByte()
			if err != nil {
				return fmt.Errorf("reading JSON: the string at byte %d is not closed", start)
			}
			sc.off++
			if e == 'u' {
				for range 4 {
					h, err := sc.r.ReadByte()
					if err != nil || !isHex(h) {
						return fmt.Errorf("reading JSON: bad \\u escape in the string at byte %d", start)
					}
					sc.off++
				}
			} else if !slices.Contains([]byte(`"\/bfnrt`), e) {
				return fmt.Errorf("reading JSON: bad escape \\%c in the string at byte %d", e, start)
			}
		case c < 0x20:
			return fmt.Errorf("reading JSON: control character in the string at byte %d", start)
		}
	}
}

func isHex(c byte) bool { return isDigit(c) || (c >= 'a' && c <= 'f') || (c >= 'A' && c <= 'F') }

// appendNaN appends n NaNs, the values of a sample that cannot be read.
func appendNaN(dst []float64, n int) []float64 {
	for range n {
		dst = append(dst, math.NaN())
	}
	return dst
}
