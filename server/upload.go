package server

import (
	"errors"
	"fmt"
	"io"
	"mime/multipart"
	"net/http"
	"os"
	"path/filepath"
	"strconv"
	"strings"
)

const (
	maxUploadFiles  = 100000
	maxParamsBytes  = 64 << 10
	maxNameBytes    = 200
	uploadKindZip   = "zip"
	uploadKindFiles = "files"
)

// createFromUpload streams a multipart body ("files" parts, optional
// "params" JSON and "name") into a new session's frames/ folder, files as
// received, and starts the review. The whole body is limited to
// MaxUploadBytes; on any error the half-made session folder is removed.
func (s *Server) createFromUpload(w http.ResponseWriter, r *http.Request) (sess *Session, err error) {
	r.Body = http.MaxBytesReader(w, r.Body, s.opt.MaxUploadBytes)
	mr, err := r.MultipartReader()
	if err != nil {
		return nil, errorf(KindInvalid, "upload: %v", err)
	}
	id, dir, err := s.newSessionDir()
	if err != nil {
		return nil, err
	}
	defer func() {
		if err != nil {
			os.RemoveAll(dir)
		}
	}()
	var (
		files     []string
		taken     = map[string]bool{}
		paramsRaw []byte
		name      string
	)
	for {
		part, perr := mr.NextPart()
		if perr == io.EOF {
			break
		}
		if perr != nil {
			return nil, wrapUploadErr(perr)
		}
		switch part.FormName() {
		case "files", "file":
			if len(files) >= maxUploadFiles {
				part.Close()
				return nil, errorf(KindInvalid, "upload: more than %d files", maxUploadFiles)
			}
			fn := uniqueName(safeName(part.FileName()), taken)
			if err := saveUploadPart(filepath.Join(dir, framesDirName, fn), part); err != nil {
				return nil, err
			}
			files = append(files, fn)
		case "params":
			paramsRaw, err = io.ReadAll(io.LimitReader(part, maxParamsBytes+1))
			if err != nil {
				return nil, wrapUploadErr(err)
			}
			if len(paramsRaw) > maxParamsBytes {
				return nil, errorf(KindInvalid, "upload: params larger than %d bytes", maxParamsBytes)
			}
		case "name":
			b, err := io.ReadAll(io.LimitReader(part, maxNameBytes))
			if err != nil {
				return nil, wrapUploadErr(err)
			}
			name = strings.TrimSpace(string(b))
		}
		part.Close()
	}
	if len(files) == 0 {
		return nil, errorf(KindInvalid, "upload: no \"files\" parts (send frames or one .zip)")
	}
	p, err := decodeParams(DefaultParams(), paramsRaw)
	if err != nil {
		return nil, err
	}
	if name == "" {
		name = files[0]
		if len(files) > 1 {
			name = fmt.Sprintf("%s and %d more", files[0], len(files)-1)
		}
	}
	return s.createSession(id, dir, name, Source{Kind: "upload", Files: files}, p)
}

func wrapUploadErr(err error) error {
	var mbe *http.MaxBytesError
	if errors.As(err, &mbe) {
		return err // statusOf answers 413
	}
	return errorf(KindInvalid, "upload: %v", err)
}

func saveUploadPart(path string, part *multipart.Part) error {
	f, err := os.OpenFile(path, os.O_CREATE|os.O_EXCL|os.O_WRONLY, 0o644)
	if err != nil {
		return fmt.Errorf("server: save upload: %w", err)
	}
	_, err = io.Copy(f, part)
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		return wrapUploadErr(err)
	}
	return nil
}

// safeName keeps the base name of an uploaded file with only letters,
// digits, '.', '-' and '_', so it cannot leave the frames folder.
func safeName(n string) string {
	n = strings.ReplaceAll(n, "\\", "/")
	n = n[strings.LastIndexByte(n, '/')+1:]
	var b strings.Builder
	for _, r := range n {
		switch {
		case r >= 'a' && r <= 'z', r >= 'A' && r <= 'Z', r >= '0' && r <= '9', r == '.', r == '-', r == '_':
			b.WriteRune(r)
		default:
			b.WriteByte('_')
		}
		if b.Len() >= 120 {
			break
		}
	}
	out := strings.TrimLeft(b.String(), ".")
	if out == "" {
		out = "file"
	}
	return out
}

// uniqueName makes n unique among taken by adding -2, -3, ... before the
// extension (a folder picker can send the same base name twice).
func uniqueName(n string, taken map[string]bool) string {
	out := n
	ext := filepath.Ext(n)
	for i := 2; taken[strings.ToLower(out)]; i++ {
		out = strings.TrimSuffix(n, ext) + "-" + strconv.Itoa(i) + ext
	}
	taken[strings.ToLower(out)] = true
	return out
}

// uploadKind tells a single .zip apart from a set of frame files.
func uploadKind(files []string) string {
	if len(files) == 1 && strings.EqualFold(filepath.Ext(files[0]), ".zip") {
		return uploadKindZip
	}
	return uploadKindFiles
}
