package httpapi

import (
	"bytes"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/memprobe"
)

// manySamples is an explain request body of about size bytes: the demo's
// sample repeated, as a client that sends a whole data set at once would.
func manySamples(t testing.TB, size int) []byte {
	sample := strings.TrimSpace(demoSampleJSON(t))
	n := size / (len(sample) + 1)
	return []byte(`{"inputs": [` + strings.TrimSuffix(strings.Repeat(sample+",", n), ",") + `], "method": "grad"}`)
}

// postAll posts body to the handler from n clients at once and returns
// their statuses.
func postAll(h http.Handler, body []byte, n int) []int {
	codes := make([]int, n)
	var wg sync.WaitGroup
	for i := range n {
		wg.Add(1)
		go func() {
			defer wg.Done()
			rec := httptest.NewRecorder()
			h.ServeHTTP(rec, httptest.NewRequest(http.MethodPost, "/v1/explain", bytes.NewReader(body)))
			codes[i] = rec.Code
		}()
	}
	wg.Wait()
	return codes
}

func TestServeBodyMemory(t *testing.T) {
	// A body of 1 MiB holding 21,000 samples, far over the 256 a request
	// may hold: refused once the 257th is read, after allocating less than
	// four times the body (the body, and the values of its fields), where
	// reading every sample cost about 80 times.
	h, _, _ := testServer(t, nil)
	body := manySamples(t, 1<<20)
	var codes []int
	_, allocated := memprobe.Measure(func() { codes = postAll(h, body, 1) })
	require.Equal(t, []int{http.StatusRequestEntityTooLarge}, codes)
	assert.Less(t, allocated, uint64(4*len(body)), "allocated %d bytes for a body of %d", allocated, len(body))
}

// BenchmarkServeBodyMemory posts 16 bodies of 8 MiB (about 170,000 samples
// each) at once and reports the peak heap, in MB.
func BenchmarkServeBodyMemory(b *testing.B) {
	h, _, _ := testServer(b, nil)
	body := manySamples(b, 8<<20-1<<10) // just under the body limit
	var peak uint64
	for b.Loop() {
		p, _ := memprobe.Measure(func() { postAll(h, body, 16) })
		peak = max(peak, p)
	}
	b.ReportMetric(float64(peak)/1e6, "peak-heap-MB")
}
