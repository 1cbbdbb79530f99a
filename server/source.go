package server

import (
	"fmt"
	"io"
)

// entry is one member of an uploaded .zip, opened for a preview.
type entry struct {
	Name string
	open func() (io.ReadCloser, error)
}

// readEntry reads at most limit bytes of e.
func readEntry(e entry, limit int64) ([]byte, error) {
	rc, err := e.open()
	if err != nil {
		return nil, err
	}
	defer rc.Close()
	data, err := io.ReadAll(io.LimitReader(rc, limit+1))
	if err != nil {
		return nil, err
	}
	if int64(len(data)) > limit {
		return nil, fmt.Errorf("larger than %d bytes", limit)
	}
	return data, nil
}
