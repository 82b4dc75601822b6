package render

import (
	"bytes"
	"image/png"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestTokensPNG(t *testing.T) {
	var b bytes.Buffer
	tokens := []string{"pump", "leaking", "again", "[pad]"}
	require.NoError(t, Tokens(&b, "a title", tokens, []float64{0.1, 2, -1, 0}, "a note"))
	img, err := png.Decode(&b)
	require.NoError(t, err)
	assert.Equal(t, tokenWidth, img.Bounds().Dx())
	// The largest attribution's box is PuOr's orange end, #B35806
	// (ColorBrewer, Harrower & Brewer 2003), somewhere in the figure.
	found := false
	for y := range img.Bounds().Dy() {
		for x := range img.Bounds().Dx() {
			r, g, bl, _ := img.At(x, y).RGBA()
			found = found || (r>>8 == 0xB3 && g>>8 == 0x58 && bl>>8 == 0x06)
		}
	}
	assert.True(t, found)
	assert.Error(t, Tokens(&b, "t", tokens, []float64{1}), "one attribution per token")
}

func TestTokenColours(t *testing.T) {
	// The ends and the middle of PuOr (Harrower & Brewer 2003): t = +1 is
	// #B35806, 0 is #F7F7F7, −1 is #542788.
	assert.Equal(t, "#B35806", hexColor(divergingT(2, tokenScale([]float64{2, -1}))))
	assert.Equal(t, "#F7F7F7", hexColor(0))
	assert.Equal(t, "#542788", hexColor(-1))
	assert.Equal(t, "+0.12", shortNumber(0.1234))
	assert.Equal(t, "-1.5", shortNumber(-1.5))
	assert.Equal(t, 1.0, tokenScale([]float64{0, 0}))
}
