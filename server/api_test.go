package server

import (
	"bytes"
	"encoding/json"
	"io"
	"log/slog"
	"mime/multipart"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
)

// testServer is a Server behind httptest on 127.0.0.1:0.
type testServer struct {
	*Server
	ts *httptest.Server
}

func mustServer(t testing.TB, opt Options) *testServer {
	t.Helper()
	if opt.DataDir == "" {
		opt.DataDir = t.TempDir()
	}
	if opt.Logger == nil {
		opt.Logger = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	s, err := New(opt)
	if err != nil {
		t.Fatal(err)
	}
	ts := httptest.NewServer(s.Handler())
	s.SetBaseURL(ts.URL)
	t.Cleanup(func() { ts.Close(); s.Close() })
	return &testServer{s, ts}
}

type upFile struct {
	name string
	data []byte
}

// multipartBody builds a POST /api/sessions body with "files" and "params".
func multipartBody(t testing.TB, files []upFile, params string) (*bytes.Buffer, string) {
	t.Helper()
	var buf bytes.Buffer
	w := multipart.NewWriter(&buf)
	for _, f := range files {
		fw, err := w.CreateFormFile("files", f.name)
		if err != nil {
			t.Fatal(err)
		}
		fw.Write(f.data)
	}
	if params != "" {
		w.WriteField("params", params)
	}
	w.Close()
	return &buf, w.FormDataContentType()
}

func (ts *testServer) do(t testing.TB, method, path, tok, ctype string, body io.Reader) (int, []byte) {
	t.Helper()
	req, err := http.NewRequest(method, ts.ts.URL+path, body)
	if err != nil {
		t.Fatal(err)
	}
	if tok != "" {
		req.Header.Set("Authorization", "Bearer "+tok)
	}
	if ctype != "" {
		req.Header.Set("Content-Type", ctype)
	}
	res, err := ts.ts.Client().Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	b, _ := io.ReadAll(res.Body)
	return res.StatusCode, b
}

func (ts *testServer) mustUpload(t testing.TB, files []upFile, params string) createdResponse {
	t.Helper()
	body, ct := multipartBody(t, files, params)
	code, b := ts.do(t, "POST", "/api/sessions", "", ct, body)
	if code != http.StatusCreated {
		t.Fatalf("upload: %d %s", code, b)
	}
	var cr createdResponse
	if err := json.Unmarshal(b, &cr); err != nil {
		t.Fatal(err)
	}
	return cr
}

func TestTokens(t *testing.T) {
	ts := mustServer(t, Options{})
	cr := ts.mustUpload(t, []upFile{{"a.png", []byte("not really a png")}}, `{"pace":0}`)
	if len(cr.OwnerToken) != 32 || len(cr.ShareToken) != 32 || cr.OwnerToken == cr.ShareToken {
		t.Fatalf("tokens %q %q: want two different 128-bit hex tokens", cr.OwnerToken, cr.ShareToken)
	}
	if !strings.HasSuffix(cr.ShareURL, "/share/"+cr.ShareToken) || !strings.Contains(cr.OwnerURL, "#token="+cr.OwnerToken) {
		t.Fatalf("urls %q %q", cr.OwnerURL, cr.ShareURL)
	}
	patch := func(tok, body string) int {
		code, _ := ts.do(t, "PATCH", "/api/sessions/"+cr.ID+"/params", tok, "application/json", strings.NewReader(body))
		return code
	}
	t.Run("ShareWriteForbidden", func(t *testing.T) {
		if c := patch(cr.ShareToken, `{"top_r":5}`); c != http.StatusForbidden {
			t.Fatalf("share token PATCH: %d, want 403", c)
		}
	})
	t.Run("NoTokenUnauthorized", func(t *testing.T) {
		if c := patch("", `{"top_r":5}`); c != http.StatusUnauthorized {
			t.Fatalf("PATCH without token: %d, want 401", c)
		}
	})
	t.Run("WrongTokenForbidden", func(t *testing.T) {
		if c := patch(strings.Repeat("0", 32), `{"top_r":5}`); c != http.StatusForbidden {
			t.Fatalf("PATCH with a foreign token: %d, want 403", c)
		}
	})
	t.Run("OwnerWrites", func(t *testing.T) {
		code, b := ts.do(t, "PATCH", "/api/sessions/"+cr.ID+"/params", cr.OwnerToken, "application/json", strings.NewReader(`{"top_r":5,"policy":"random"}`))
		if code != http.StatusOK {
			t.Fatalf("owner PATCH: %d %s", code, b)
		}
		var st Status
		json.Unmarshal(b, &st)
		if st.Params.TopR != 5 || st.Params.Policy != "random" || st.Params.Budget != "3%" {
			t.Fatalf("params after PATCH: %+v (top_r 5, policy random, budget kept)", st.Params)
		}
	})
	t.Run("OwnerBadParams", func(t *testing.T) {
		if c := patch(cr.OwnerToken, `{"policy":"psychic"}`); c != http.StatusBadRequest {
			t.Fatalf("bad policy: %d, want 400", c)
		}
	})
	t.Run("ShareReads", func(t *testing.T) {
		code, b := ts.do(t, "GET", "/api/sessions/"+cr.ID, cr.ShareToken, "", nil)
		if code != http.StatusOK || !strings.Contains(string(b), `"id":"`+cr.ID+`"`) {
			t.Fatalf("share token GET status: %d %s", code, b)
		}
		code, b = ts.do(t, "GET", "/api/share/"+cr.ShareToken, "", "", nil)
		if code != http.StatusOK || !strings.Contains(string(b), cr.ID) {
			t.Fatalf("share lookup: %d %s", code, b)
		}
		code, _ = ts.do(t, "GET", "/share/"+cr.ShareToken, "", "", nil)
		if code != http.StatusOK {
			t.Fatalf("share page: %d", code)
		}
	})
}

func TestUnknownSession(t *testing.T) {
	ts := mustServer(t, Options{})
	for _, p := range []string{
		"/api/sessions/0123456789abcdef", "/api/sessions/nope/report", "/api/sessions/nope/alarms.csv",
		"/ws/sessions/nope?token=x", "/api/share/nope", "/share/nope",
	} {
		if code, b := ts.do(t, "GET", p, "x", "", nil); code != http.StatusNotFound {
			t.Errorf("GET %s: %d %s, want 404", p, code, b)
		}
	}
	if code, _ := ts.do(t, "PATCH", "/api/sessions/nope/params", "x", "application/json", strings.NewReader("{}")); code != http.StatusNotFound {
		t.Errorf("PATCH unknown: %d, want 404", code)
	}
	// A person following a bad share link gets a page that says so.
	if _, b := ts.do(t, "GET", "/share/nope", "", "", nil); !strings.Contains(string(b), "<html") || !strings.Contains(string(b), "not valid") {
		t.Errorf("GET /share/nope: %.200s; want an HTML page saying the link is not valid", b)
	}
}

func TestOversizeUpload(t *testing.T) {
	ts := mustServer(t, Options{MaxUploadBytes: 10 << 10})
	body, ct := multipartBody(t, []upFile{{"big.png", bytes.Repeat([]byte{1}, 20<<10)}}, "")
	code, b := ts.do(t, "POST", "/api/sessions", "", ct, body)
	if code != http.StatusRequestEntityTooLarge {
		t.Fatalf("oversize upload: %d %s, want 413", code, b)
	}
	code, b = ts.do(t, "GET", "/api/sessions", "", "", nil)
	if code != http.StatusOK || strings.Contains(string(b), `"id"`) {
		t.Fatalf("a refused upload left a session behind: %s", b)
	}
}

func TestInternalErrorIsGeneric(t *testing.T) {
	code, msg := statusOf(io.ErrUnexpectedEOF)
	if code != 500 || msg != "internal error" {
		t.Fatalf("plain error: %d %q", code, msg)
	}
	code, msg = statusOf(&Error{Kind: KindInternal, Msg: "secret path /x", Err: io.EOF})
	if code != 500 || strings.Contains(msg, "secret") {
		t.Fatalf("internal error leaks: %d %q", code, msg)
	}
	if code, _ := statusOf(errorf(KindForbidden, "no")); code != 403 {
		t.Fatalf("forbidden: %d", code)
	}
}
