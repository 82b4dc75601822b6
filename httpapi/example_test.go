package httpapi_test

import (
	"encoding/json"
	"fmt"
	"net/http"
	"net/http/httptest"
	"strings"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/httpapi"
)

// Mounting the /v1 API of the embedded pumps demo under a prefix of one's
// own mux, beside one's own routes, and explaining a reading with the
// gradient (the command line's alias "grad" works too).
func Example() {
	s, err := demo.Get("pumps")
	if err != nil {
		fmt.Println(err)
		return
	}
	m, err := explain.Decode(s.Model, "pumps.onnx", explain.DecodeOptions{})
	if err != nil {
		fmt.Println(err)
		return
	}
	api, err := httpapi.New(m, httpapi.Options{Queue: 8})
	if err != nil {
		fmt.Println(err)
		return
	}
	defer api.Close()
	mux := http.NewServeMux()
	mux.Handle("/pumps/", http.StripPrefix("/pumps", api))
	srv := httptest.NewServer(mux)
	defer srv.Close()

	resp, err := http.Post(srv.URL+"/pumps/v1/explain", "application/json",
		strings.NewReader(`{"inputs": [[77.2, 7.14, 5.49, 1.29, 145.5, 42, 6277, 22.7]], "method": "grad"}`))
	if err != nil {
		fmt.Println(err)
		return
	}
	defer resp.Body.Close()
	var doc struct {
		Method       string `json:"method"`
		Explanations []struct {
			Target int `json:"target"`
		} `json:"explanations"`
	}
	if err := json.NewDecoder(resp.Body).Decode(&doc); err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println(resp.Status, doc.Method, m.Meta.Class(doc.Explanations[0].Target))
	// Output:
	// 200 OK gradient failing
}
