// Package web holds the watcher page (vanilla JS, canvas, no build step),
// embedded into the binary.
package web

import (
	"embed"
	"io/fs"
)

//go:embed static
var files embed.FS

// FS is the page's files, rooted at static/ (index.html at the top).
var FS fs.FS = mustSub(files, "static")

func mustSub(f fs.FS, dir string) fs.FS {
	sub, err := fs.Sub(f, dir)
	if err != nil {
		panic(err)
	}
	return sub
}
