package frames

import (
	"archive/zip"
	"errors"
	"fmt"
	"io"
	"os"
	"path"
	"path/filepath"
	"strings"
)

// Listing is what a folder or archive holds, before any decoding.
type Listing struct {
	Frames  []string // frame files in natural order
	Skipped []string // files ignored because their extension is not a frame format
}

// OpenFolder returns a source over the frame files of dir (by extension:
// .png .jpg .gif .bmp .tif .webp .fits ...) in natural order; hidden files
// and other files are skipped and listed in Listing.Skipped.
func OpenFolder(dir string, opts Options) (Source, *Listing, error) {
	des, err := os.ReadDir(dir)
	if err != nil {
		return nil, nil, fmt.Errorf("frames: %w", err)
	}
	lst := &Listing{}
	for _, de := range des {
		name := de.Name()
		if strings.HasPrefix(name, ".") || de.IsDir() {
			continue
		}
		if FormatOf(name) == Unknown {
			lst.Skipped = append(lst.Skipped, name)
			continue
		}
		lst.Frames = append(lst.Frames, name)
	}
	SortNatural(lst.Frames)
	s := &entrySource{opts: opts}
	for _, name := range lst.Frames {
		p := filepath.Join(dir, name)
		s.entries = append(s.entries, entry{
			name: name, path: p, size: -1,
			open: func() (io.ReadCloser, error) { return os.Open(p) },
		})
	}
	return s, lst, nil
}

// OpenZip returns a source over the frame files of a .zip archive in
// natural order. Entries whose names escape the archive's folder
// (absolute, "..", drive letters, backslashes) are refused each with an
// *UnsafePathError item; the other entries are still read.
func OpenZip(r io.ReaderAt, size int64, opts Options) (Source, *Listing, error) {
	zr, err := zip.NewReader(r, size)
	if err != nil && !errors.Is(err, zip.ErrInsecurePath) {
		return nil, nil, FormatError("zip: " + err.Error())
	}
	lst := &Listing{}
	byName := map[string]*zip.File{}
	var unsafe []string
	for _, zf := range zr.File {
		name := zf.Name
		if !SafeEntryName(name) {
			unsafe = append(unsafe, name)
			byName[name] = zf
			continue
		}
		if strings.HasSuffix(name, "/") || zf.FileInfo().IsDir() {
			continue
		}
		base := path.Base(name)
		if strings.HasPrefix(base, ".") || strings.HasPrefix(name, "__MACOSX/") {
			continue
		}
		if FormatOf(name) == Unknown {
			lst.Skipped = append(lst.Skipped, name)
			continue
		}
		if _, dup := byName[name]; dup {
			continue // a repeated name: the first entry wins
		}
		byName[name] = zf
		lst.Frames = append(lst.Frames, name)
	}
	all := append(append([]string{}, lst.Frames...), unsafe...)
	SortNatural(all)
	s := &entrySource{opts: opts}
	for _, name := range all {
		zf := byName[name]
		e := entry{name: name, size: int64(zf.UncompressedSize64), open: zf.Open}
		if zf.UncompressedSize64 > 1<<62 {
			e.size = 1 << 62
		}
		if !SafeEntryName(name) {
			e.err = &UnsafePathError{Name: name}
		}
		s.entries = append(s.entries, e)
	}
	return s, lst, nil
}

// OpenZipFile opens the archive at p; see OpenZip.
func OpenZipFile(p string, opts Options) (Source, *Listing, error) {
	f, err := os.Open(p)
	if err != nil {
		return nil, nil, fmt.Errorf("frames: %w", err)
	}
	st, err := f.Stat()
	if err != nil {
		f.Close()
		return nil, nil, fmt.Errorf("frames: %w", err)
	}
	src, lst, err := OpenZip(f, st.Size(), opts)
	if err != nil {
		f.Close()
		return nil, nil, fmt.Errorf("frames: %s: %w", filepath.Base(p), err)
	}
	src.(*entrySource).closer = f.Close
	return src, lst, nil
}

// OpenFile returns a source for a single frame file (a FITS cube gives one
// item per plane).
func OpenFile(p string, opts Options) (Source, error) {
	st, err := os.Stat(p)
	if err != nil {
		return nil, fmt.Errorf("frames: %w", err)
	}
	if st.IsDir() {
		return nil, fmt.Errorf("frames: %s is a folder", p)
	}
	name := filepath.Base(p)
	s := &entrySource{opts: opts, entries: []entry{{
		name: name, path: p, size: st.Size(),
		open: func() (io.ReadCloser, error) { return os.Open(p) },
	}}}
	return s, nil
}

// Open picks the source for a command-line argument: a folder, a .zip
// archive, or a single frame file.
func Open(p string, opts Options) (Source, *Listing, error) {
	st, err := os.Stat(p)
	if err != nil {
		return nil, nil, fmt.Errorf("frames: %w", err)
	}
	switch {
	case st.IsDir():
		return OpenFolder(p, opts)
	case strings.EqualFold(filepath.Ext(p), ".zip"):
		return OpenZipFile(p, opts)
	}
	src, err := OpenFile(p, opts)
	return src, &Listing{Frames: []string{filepath.Base(p)}}, err
}

// SafeEntryName reports whether an archive entry name stays inside the
// archive's folder: relative, no ".." element, no backslash or drive letter.
func SafeEntryName(name string) bool {
	if name == "" || strings.ContainsAny(name, "\\:\x00") || strings.HasPrefix(name, "/") {
		return false
	}
	for _, el := range strings.Split(name, "/") {
		if el == ".." {
			return false
		}
	}
	return filepath.IsLocal(filepath.FromSlash(strings.TrimSuffix(name, "/")))
}
