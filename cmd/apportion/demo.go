package main

import "github.com/apportion/apportion/internal/demo"

func init() {
	demoModel = func() (model, sample []byte, name string) {
		s, err := demo.Get(demo.Default)
		if err != nil {
			return nil, nil, ""
		}
		return s.Model, s.Sample, s.SampleFile
	}
}
