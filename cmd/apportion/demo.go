package main

import "github.com/apportion/apportion/demo"

func init() {
	demoScenario = func(name string) (*demoFiles, error) {
		s, err := demo.Get(name)
		if err != nil {
			return nil, err
		}
		return &demoFiles{
			model: s.Model, modelFile: s.ModelFile, sample: s.Sample, sampleFile: s.SampleFile,
			reference: s.Reference, referenceFile: s.ReferenceFile,
		}, nil
	}
}
