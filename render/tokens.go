package render

import (
	"fmt"
	"html"
	"image"
	"io"
	"math"
	"strconv"
	"strings"

	"github.com/apportion/apportion/explain"
)

// Sizes of a token figure, in pixels.
const (
	tokenWidth  = 760 // of the figure
	tokenPad    = 5   // around a token's text, inside its box
	tokenGap    = 6   // between boxes
	tokenBoxH   = 22
	tokenRowH   = tokenBoxH + pngLine + 8 // a box and its value below
	tokenLegend = 240                     // width of the colour bar
)

// tokenScale is the scale s of a token figure: max |a|, 1 when every
// attribution is 0 (a sentence has few tokens, so none is an outlier to
// clip, unlike a heatmap's pixels).
func tokenScale(attr []float64) float64 {
	s := 0.0
	for _, a := range attr {
		if !math.IsNaN(a) && !math.IsInf(a, 0) {
			s = math.Max(s, math.Abs(a))
		}
	}
	if s == 0 {
		return 1
	}
	return s
}

// inkOn returns the text colour that reads on a box of colour map
// coordinate t: white on the dark ends of PuOr, ink elsewhere.
func inkOn(t float64) string {
	if math.Abs(t) > 0.6 {
		return "#FFFFFF"
	}
	return "#202020"
}

// shortNumber writes v with two significant digits and its sign: +0.12.
func shortNumber(v float64) string {
	s := strconv.FormatFloat(v, 'g', 2, 64)
	if v >= 0 {
		s = "+" + s
	}
	return s
}

// Tokens draws a text as its tokens in order, each on a box tinted by its
// attribution in the PuOr map (t = a/s, s = max |a|: orange for the
// target, purple against), its attribution printed below it with its
// sign, and a colour bar from −s to +s; title and notes above.
func Tokens(w io.Writer, title string, tokens []string, attr []float64, notes ...string) error {
	if len(tokens) != len(attr) {
		return fmt.Errorf("png: %d tokens and %d attributions", len(tokens), len(attr))
	}
	if err := checkFiniteValues("attribution", attr); err != nil {
		return err
	}
	face, err := newFace()
	if err != nil {
		return err
	}
	s := tokenScale(attr)
	lines := wrapText(face, append([]string{title}, notes...), tokenWidth-2*pngMargin)
	// Lay the boxes out in rows.
	type box struct{ x, row, w int }
	boxes := make([]box, len(tokens))
	x, row := pngMargin, 0
	for i, t := range tokens {
		bw := textWidth(face, t) + 2*tokenPad
		if vw := textWidth(face, shortNumber(attr[i])); vw+2*tokenPad > bw {
			bw = vw + 2*tokenPad
		}
		if x+bw > tokenWidth-pngMargin && x > pngMargin {
			x, row = pngMargin, row+1
		}
		boxes[i] = box{x, row, bw}
		x += bw + tokenGap
	}
	top := pngMargin + len(lines)*pngLine + 10
	legendY := top + (row+1)*tokenRowH + 10
	height := legendY + 2*pngLine + pngMargin
	c := newCanvas(tokenWidth, height, face)
	c.writeLines(lines)
	for i, b := range boxes {
		y := top + b.row*tokenRowH
		t := divergingT(attr[i], s)
		r := image.Rect(b.x, y, b.x+b.w, y+tokenBoxH)
		c.fill(r, puor(t))
		c.frame(r, colorFrame)
		ink := colorInk
		if math.Abs(t) > 0.6 {
			ink = colorWhite
		}
		c.text(tokens[i], b.x+b.w/2, y+tokenBoxH-6, 0.5, ink)
		c.text(shortNumber(attr[i]), b.x+b.w/2, y+tokenBoxH+pngLine-2, 0.5, colorAxis)
	}
	// The colour bar, −s at the left, +s at the right.
	x0 := pngMargin
	for i := range tokenLegend {
		t := 2*(float64(i)+0.5)/tokenLegend - 1
		c.fill(image.Rect(x0+i, legendY, x0+i+1, legendY+12), puor(t))
	}
	c.frame(image.Rect(x0, legendY, x0+tokenLegend, legendY+12), colorFrame)
	ly := legendY + 12 + pngLine - 4
	c.text("−"+Number(s), x0, ly, 0, colorInk)
	c.text("0", x0+tokenLegend/2, ly, 0.5, colorInk)
	c.text("+"+Number(s), x0+tokenLegend, ly, 1, colorInk)
	c.text("s = the largest |attribution|; orange +, purple −", x0+tokenLegend+16, legendY+11, 0, colorInk)
	return c.encode(w)
}

// hexColor writes c as #RRGGBB.
func hexColor(t float64) string {
	c := puor(t)
	return fmt.Sprintf("#%02X%02X%02X", c.R, c.G, c.B)
}

// HTML writes the explanations of a report of token attributions (see
// explain.Report.Tokens) as one self-contained HTML page: per sample its
// title, notes and the text with each token on a background tinted by its
// attribution as in Tokens (its value in a tooltip and below it), and a
// colour bar.
func HTML(w io.Writer, rep *explain.Report, opt Options) error {
	if !rep.Tokens {
		return fmt.Errorf("html: the page shows attributions per token, of a model of token ids; this report is of %s", featureKind(rep))
	}
	var b strings.Builder
	b.WriteString(`<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>`)
	b.WriteString(html.EscapeString(fmt.Sprintf("%s: %s", rep.Model.Name, rep.Settings.Method)))
	b.WriteString(`</title>
<style>
body { font-family: sans-serif; color: #202020; margin: 2em; max-width: 60em; }
h1 { font-size: 1.2em; } h2 { font-size: 1em; margin-top: 2em; }
p.note { margin: 0.2em 0; color: #404040; }
div.text { margin: 1em 0; line-height: 3.2em; }
span.tok { display: inline-block; text-align: center; padding: 0.1em 0.35em; margin: 0 0.15em; border: 1px solid #B0B0B0; line-height: 1.5em; }
span.tok small { display: block; color: #606060; background: #FFFFFF; font-size: 0.7em; line-height: 1.2em; }
div.bar { width: 240px; height: 0.8em; border: 1px solid #B0B0B0; background: linear-gradient(to right`)
	for i := len(PuOr) - 1; i >= 0; i-- {
		c := PuOr[i]
		fmt.Fprintf(&b, ", #%02X%02X%02X", c.R, c.G, c.B)
	}
	b.WriteString(`); }
div.legend { display: flex; width: 240px; justify-content: space-between; font-size: 0.8em; }
</style></head><body>
`)
	fmt.Fprintf(&b, "<h1>%s</h1>\n", html.EscapeString(fmt.Sprintf("model %s, output %s, method %s", rep.Model.Name, outputLabel(rep), rep.Settings.Method)))
	for _, e := range rep.Explanations {
		if e.Err != nil {
			fmt.Fprintf(&b, "<h2>sample %d</h2>\n<p class=\"note\">error: %s</p>\n", e.Index, html.EscapeString(e.Err.Error()))
			continue
		}
		f := explanationFigure(rep, e, opt)
		tf := f.tokens
		fmt.Fprintf(&b, "<h2>%s</h2>\n", html.EscapeString(tf.title))
		for _, n := range tf.notes {
			fmt.Fprintf(&b, "<p class=\"note\">%s</p>\n", html.EscapeString(n))
		}
		s := tokenScale(tf.attr)
		b.WriteString("<div class=\"text\">")
		for i, t := range tf.tokens {
			v := divergingT(tf.attr[i], s)
			fmt.Fprintf(&b, `<span class="tok" style="background:%s;color:%s" title="attribution %s">%s<small>%s</small></span>`,
				hexColor(v), inkOn(v), strconv.FormatFloat(tf.attr[i], 'g', -1, 64), html.EscapeString(t), shortNumber(tf.attr[i]))
		}
		b.WriteString("</div>\n")
		fmt.Fprintf(&b, "<div class=\"bar\"></div><div class=\"legend\"><span>−%s</span><span>0</span><span>+%s</span></div>\n", Number(s), Number(s))
		b.WriteString("<p class=\"note\">s = the largest |attribution|; orange +, purple −</p>\n")
	}
	b.WriteString("</body></html>\n")
	_, err := io.WriteString(w, b.String())
	return err
}

// featureKind says what a report's attributions are of, for a message.
func featureKind(rep *explain.Report) string {
	if rep.Layer != "" {
		return "the values of " + rep.Layer
	}
	return "input features"
}

// tokenFigure holds Tokens' arguments.
type tokenFigure struct {
	title  string
	notes  []string
	tokens []string
	attr   []float64
}
