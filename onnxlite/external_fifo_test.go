//go:build unix

package onnxlite

import (
	"path/filepath"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestExternalDataFIFORefused(t *testing.T) {
	// External data that names a FIFO (mkfifo(3), POSIX): opening it for
	// reading blocks until a writer comes, so it must be refused without
	// being opened. The decode runs in a goroutine so that a regression
	// fails the test instead of hanging it.
	dir := t.TempDir()
	require.NoError(t, syscall.Mkfifo(filepath.Join(dir, "w.fifo"), 0o600))
	path := writeExternalModel(t, dir, []int64{4}, "location", "w.fifo")
	done := make(chan error, 1)
	go func() {
		_, err := DecodeFile(path, DecodeOptions{})
		done <- err
	}()
	select {
	case err := <-done:
		require.ErrorIs(t, err, ErrExternalData)
		assert.Contains(t, err.Error(), `external data file "w.fifo" is not a regular file`)
	case <-time.After(30 * time.Second):
		t.Fatal("decoding a model whose external data is a FIFO did not return: the FIFO was opened")
	}
}
