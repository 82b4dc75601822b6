package httpapi

import (
	"bytes"
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"testing"
	"time"
)

// FuzzRequestBody posts arbitrary bytes to /v1/explain and /v1/predict of
// a handler serving the pumps demo (whose samples may be arrays, or objects
// of its named features) with a budget that keeps each request small. No request may panic or fail inside the server (500); every
// answer is 200 or an error the client caused or a limit, with a JSON body
// of its own.
func FuzzRequestBody(f *testing.F) {
	sample := demoSampleJSON(f)
	for _, seed := range []string{
		`{"inputs": [` + sample + `]}`,
		`{"inputs": [` + sample + `, ` + sample + `], "method": "grad"}`,
		`{"inputs": ` + sample + `, "method": "ig", "steps": 16, "rule": "gauss-legendre", "target": 2}`,
		`{"inputs": [` + sample + `], "method": "smoothgrad", "samples": 20, "noise": 0.2, "seed": 7}`,
		`{"inputs": [` + sample + `], "method": "expected-grad", "samples": 8}`,
		`{"inputs": [` + sample + `], "baseline": "mean", "logits": true, "steps": "auto", "tolerance": 0.1}`,
		`{"inputs": [` + sample + `], "baseline": "blur"}`,
		`{"inputs": [[1, 2, 3]], "target": "top"}`,
		`{"inputs": [[1, 2, 3, NaN, 5, 6, 7, 8]]}`,
		`{"inputs": [` + sample + `], "step": 4}`,
		`{"inputs": null}`, `[]`, `{}`, ``, `{"inputs": [` + sample,
	} {
		f.Add([]byte(seed))
	}
	// Samples as objects of the features' values by name: whole, as an
	// array, with a key misspelt, with a feature missing.
	m, ref := demoModel(f)
	var x []float64
	if err := json.Unmarshal([]byte(sample), &x); err != nil {
		f.Fatal(err)
	}
	named := map[string]float64{}
	for i, name := range m.Meta.Features {
		named[name] = x[i]
	}
	one, _ := json.Marshal(named)
	f.Add([]byte(`{"inputs": ` + string(one) + `, "method": "grad"}`))
	f.Add([]byte(`{"inputs": [` + string(one) + `, ` + string(one) + `], "steps": 8}`))
	if len(m.Meta.Features) > 0 {
		first := m.Meta.Features[0]
		named[first+"_"] = named[first]
		delete(named, first)
		misspelt, _ := json.Marshal(named)
		f.Add([]byte(`{"inputs": [` + string(misspelt) + `]}`))
		delete(named, first+"_")
		missing, _ := json.Marshal(named)
		f.Add([]byte(`{"inputs": [` + string(one) + `, ` + string(missing) + `]}`))
	}
	h, err := New(m, Options{Reference: ref, MaxWork: 4000, Timeout: 5 * time.Second, Workers: 1, Queue: 4})
	if err != nil {
		f.Fatal(err)
	}
	f.Cleanup(h.Close)
	allowed := map[int]bool{http.StatusOK: true, http.StatusBadRequest: true, http.StatusRequestEntityTooLarge: true}
	f.Fuzz(func(t *testing.T, body []byte) {
		for _, route := range []string{"/v1/explain", "/v1/predict"} {
			rec := httptest.NewRecorder()
			h.ServeHTTP(rec, httptest.NewRequest(http.MethodPost, route, bytes.NewReader(body)))
			if !allowed[rec.Code] {
				t.Fatalf("%s: status %d: %s", route, rec.Code, rec.Body)
			}
			if rec.Code != http.StatusOK {
				var e errorJSON
				if err := json.Unmarshal(rec.Body.Bytes(), &e); err != nil || e.Error == "" || e.RequestID == "" {
					t.Fatalf("%s: status %d with body %q", route, rec.Code, rec.Body)
				}
			}
		}
	})
}
