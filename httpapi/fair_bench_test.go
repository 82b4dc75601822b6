package httpapi

import (
	"context"
	"fmt"
	"io"
	"net"
	"net/http"
	"strings"
	"sync"
	"testing"
	"time"
)

// BenchmarkSmallBehindHeavy measures the latency of one small request (the
// demo's sample, integrated gradients at automatic points) sent while
// eight heavy ones (64 samples × SmoothGrad with 16,000 noisy copies,
// about a million gradient evaluations each) are being served, with the
// serve command's defaults. The heavy requests are cancelled once the small
// one is answered.
func BenchmarkSmallBehindHeavy(b *testing.B) {
	for _, coalesce := range []bool{true, false} {
		b.Run(fmt.Sprintf("coalesce=%v", coalesce), func(b *testing.B) {
			m, ref := demoModel(b)
			s, err := New(m, Options{Queue: DefaultQueue, Coalesce: coalesce, Reference: ref})
			if err != nil {
				b.Fatal(err)
			}
			defer s.Close()
			ln, err := net.Listen("tcp", "127.0.0.1:0")
			if err != nil {
				b.Fatal(err)
			}
			ctx, stop := context.WithCancel(context.Background())
			served := make(chan error, 1)
			go func() { served <- Serve(ctx, ln, s, time.Second, nil) }()
			defer func() { stop(); <-served }()
			url := "http://" + ln.Addr().String() + "/v1/explain"
			sample := demoSampleJSON(b)
			heavy := `{"inputs": [` + strings.TrimSuffix(strings.Repeat(sample+",", 64), ",") + `], "method": "smoothgrad", "samples": 16000}`
			small := `{"inputs": [` + sample + `]}`
			var worst time.Duration
			for b.Loop() {
				hctx, cancel := context.WithCancel(context.Background())
				var wg sync.WaitGroup
				for range 8 {
					wg.Add(1)
					go func() {
						defer wg.Done()
						req, _ := http.NewRequestWithContext(hctx, http.MethodPost, url, strings.NewReader(heavy))
						if resp, err := http.DefaultClient.Do(req); err == nil {
							io.Copy(io.Discard, resp.Body)
							resp.Body.Close()
						}
					}()
				}
				// The heavy requests take the workers they can get.
				time.Sleep(time.Second)
				t0 := time.Now()
				resp, err := http.Post(url, "application/json", strings.NewReader(small))
				if err != nil {
					b.Fatal(err)
				}
				io.Copy(io.Discard, resp.Body)
				resp.Body.Close()
				d := time.Since(t0)
				if resp.StatusCode != http.StatusOK {
					b.Fatalf("small request: status %d", resp.StatusCode)
				}
				worst = max(worst, d)
				cancel()
				wg.Wait()
			}
			b.ReportMetric(float64(worst.Microseconds())/1000, "small-ms")
		})
	}
}
