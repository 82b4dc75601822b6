package httpapi

import (
	"net/http"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestServeShortSecondSample(t *testing.T) {
	// A second sample of 3 values among samples of 8 (the pumps demo's
	// eight sensors) is reported by its length, as the command line does,
	// not by the NaN that marks it unread.
	_, ts, _ := testServer(t, nil)
	sample := demoSampleJSON(t)
	for route, extra := range map[string]string{"/v1/explain": `, "steps": 8`, "/v1/predict": ""} {
		code, _, body := post(t, ts.URL+route, `{"inputs": [`+sample+`, [1, 2, 3]]`+extra+`}`)
		assert.Equal(t, http.StatusBadRequest, code, route)
		msg := errorOf(t, body)
		assert.Equal(t, `"inputs" (for "sensors"): at [1]: expected 8 values (shape [8]), got 3 (shape [3])`, msg, route)
		assert.NotContains(t, msg, "NaN")
	}
}

func TestServeMaxSamples(t *testing.T) {
	// 257 samples in a request, one past the default of 256: 413 with the
	// limit, whatever the route; 256 are served.
	s, ts, _ := testServer(t, nil)
	sample := demoSampleJSON(t)
	many := func(n int) string { return "[" + strings.TrimSuffix(strings.Repeat(sample+",", n), ",") + "]" }
	code, _, body := post(t, ts.URL+"/v1/predict", `{"inputs": `+many(DefaultMaxSamples+1)+`}`)
	assert.Equal(t, http.StatusRequestEntityTooLarge, code)
	assert.Equal(t, `"inputs" holds more than the 256 samples one request may have; send them in several requests`, errorOf(t, body))
	code, _, body = post(t, ts.URL+"/v1/explain", `{"inputs": `+many(DefaultMaxSamples+1)+`, "method": "grad"}`)
	assert.Equal(t, http.StatusRequestEntityTooLarge, code, body)
	assert.Zero(t, passes(t, s), "no model pass for a refused request")
	code, _, body = post(t, ts.URL+"/v1/predict", `{"inputs": `+many(DefaultMaxSamples)+`}`)
	require.Equal(t, http.StatusOK, code, body)

	// The limit is an option of the handler.
	_, ts, _ = testServer(t, func(o *Options) { o.MaxSamples = 2 })
	code, _, body = post(t, ts.URL+"/v1/predict", `{"inputs": `+many(3)+`}`)
	assert.Equal(t, http.StatusRequestEntityTooLarge, code)
	assert.Contains(t, errorOf(t, body), "more than the 2 samples")
}
