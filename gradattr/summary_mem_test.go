package gradattr_test

import (
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/memprobe"
)

func TestDecodeSummaryMemoryFollowsTheDocument(t *testing.T) {
	// A document of 1 kB that declares 41 features × 100,000 replicates
	// (within MaxSummaryCells) but lists none of their sums is refused
	// before the summary's 4.1 million cells are allocated.
	names := make([]string, 41)
	for i := range names {
		names[i] = strconv.Quote("f" + strconv.Itoa(i))
	}
	doc := `{"format":"apportion-summary","version":1,"model_sha256":"m","method":"gradient","settings":{},` +
		`"features":[` + strings.Join(names, ",") + `],"group_by":"","bootstrap":100000,"seed":1,"rows":0,` +
		`"skipped_rows":0,"skipped":[],"keys":[],"overall":{"state":{}},"groups":[]}`
	var err error
	_, allocated := memprobe.Measure(func() { _, err = gradattr.DecodeSummary(strings.NewReader(doc)) })
	require.ErrorIs(t, err, gradattr.ErrInput)
	assert.Contains(t, err.Error(), "expected sums for 41 features")
	assert.Less(t, allocated, uint64(1<<20), "allocated %d bytes for a document of %d", allocated, len(doc))
}
