package server

import (
	"archive/zip"
	"fmt"
	"io"
	"os"
	"path"
	"path/filepath"
	"sort"
	"strings"
)

// entry is one frame file of a session: a file in frames/ or a member of
// an uploaded .zip.
type entry struct {
	Name string
	open func() (io.ReadCloser, error)
}

// entries lists a session's frame files in natural order (frame2 before
// frame10). It returns a closer for the archive when there is one.
func sessionEntries(dir string, src Source) ([]entry, io.Closer, error) {
	fdir := filepath.Join(dir, framesDirName)
	if uploadKind(src.Files) == uploadKindZip {
		zr, err := zip.OpenReader(filepath.Join(fdir, src.Files[0]))
		if err != nil {
			return nil, nil, errorf(KindInvalid, "%s: not a readable .zip archive: %v", src.Files[0], err)
		}
		var out []entry
		for _, f := range zr.File {
			if f.FileInfo().IsDir() || strings.HasPrefix(path.Base(f.Name), ".") || strings.HasPrefix(f.Name, "__MACOSX/") {
				continue
			}
			out = append(out, entry{Name: f.Name, open: f.Open})
		}
		sortEntries(out)
		return out, zr, nil
	}
	out := make([]entry, 0, len(src.Files))
	for _, n := range src.Files {
		p := filepath.Join(fdir, n)
		out = append(out, entry{Name: n, open: func() (io.ReadCloser, error) { return os.Open(p) }})
	}
	sortEntries(out)
	return out, io.NopCloser(nil), nil
}

func sortEntries(es []entry) {
	sort.SliceStable(es, func(i, j int) bool { return naturalLess(es[i].Name, es[j].Name) })
}

// naturalLess orders names with digit runs compared as numbers.
func naturalLess(a, b string) bool {
	for a != "" && b != "" {
		da, db := digitRun(a), digitRun(b)
		if da > 0 && db > 0 {
			na, nb := strings.TrimLeft(a[:da], "0"), strings.TrimLeft(b[:db], "0")
			if len(na) != len(nb) {
				return len(na) < len(nb)
			}
			if na != nb {
				return na < nb
			}
			a, b = a[da:], b[db:]
			continue
		}
		if a[0] != b[0] {
			return a[0] < b[0]
		}
		a, b = a[1:], b[1:]
	}
	return len(a) < len(b)
}

func digitRun(s string) int {
	n := 0
	for n < len(s) && s[n] >= '0' && s[n] <= '9' {
		n++
	}
	return n
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
