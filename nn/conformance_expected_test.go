package nn

// conformanceExpected lists the ONNX backend test cases (suite/name) that
// TestConformance expects to fail, each with the reason. The test fails on
// any other failure and on a listed case that passes.
var conformanceExpected = map[string]string{
	// 3-D convolution and pooling are unsupported by design: the kernels
	// cover 1-D and 2-D spatial data (NCW, NCHW).
	"node/test_averagepool_3d_default":                        "3-D pooling",
	"node/test_maxpool_3d_default":                            "3-D pooling",
	"pytorch-converted/test_AvgPool3d":                        "3-D pooling",
	"pytorch-converted/test_AvgPool3d_stride":                 "3-D pooling",
	"pytorch-converted/test_AvgPool3d_stride1_pad0_gpu_input": "3-D pooling",
	"pytorch-converted/test_MaxPool3d":                        "3-D pooling",
	"pytorch-converted/test_MaxPool3d_stride":                 "3-D pooling",
	"pytorch-converted/test_MaxPool3d_stride_padding":         "3-D pooling",
	"pytorch-converted/test_Conv3d":                           "3-D convolution",
	"pytorch-converted/test_Conv3d_dilated":                   "3-D convolution",
	"pytorch-converted/test_Conv3d_dilated_strided":           "3-D convolution",
	"pytorch-converted/test_Conv3d_groups":                    "3-D convolution",
	"pytorch-converted/test_Conv3d_no_bias":                   "3-D convolution",
	"pytorch-converted/test_Conv3d_stride":                    "3-D convolution",
	"pytorch-converted/test_Conv3d_stride_padding":            "3-D convolution",

	// Training-mode batch normalization (batch statistics and running-mean
	// outputs) is outside inference.
	"node/test_batchnorm_epsilon_training_mode": "BatchNormalization training mode",
	"node/test_batchnorm_example_training_mode": "BatchNormalization training mode",
	// Training-mode dropout drops elements at random (its reference output
	// comes from numpy's generator): refused, as outside inference.
	"node/test_training_dropout":         "Dropout training mode",
	"node/test_training_dropout_default": "Dropout training mode",
}

// conformanceExpectedFloat32 lists backend cases that pass on the float64
// engine but whose float32 results fall outside the tolerance, with the reason.
var conformanceExpectedFloat32 = map[string]string{
	// Reference values near 1e200 overflow binary32 (max ≈ 3.4e38, IEEE 754).
	"pytorch-operator/test_operator_add_broadcast":                 "values beyond the float32 range",
	"pytorch-operator/test_operator_add_size1_right_broadcast":     "values beyond the float32 range",
	"pytorch-operator/test_operator_add_size1_singleton_broadcast": "values beyond the float32 range",
	"pytorch-operator/test_operator_addconstant":                   "values beyond the float32 range",
}
