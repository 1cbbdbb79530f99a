package server

import (
	"errors"
	"fmt"
	"log/slog"
	"net/http"
)

// Kind classifies an error for the HTTP boundary. Do not reorder: status
// codes are looked up by kind in statusOf.
type Kind uint8

const (
	KindInternal     Kind = iota // a bug or an I/O failure: logged in full, generic message sent
	KindInvalid                  // bad input the caller can fix
	KindNotFound                 // no such session or file
	KindUnauthorized             // no token given
	KindForbidden                // a token that does not allow this (a share token writing)
	KindTooLarge                 // upload over the limit
	KindUnavailable              // shutting down, or the feature is not enabled
)

// Error is an error with a kind and a message that is safe to show.
type Error struct {
	Kind Kind
	Msg  string // shown to the client (not for KindInternal)
	Err  error  // cause, logged, never sent
}

func (e *Error) Error() string {
	if e.Err != nil {
		return "server: " + e.Msg + ": " + e.Err.Error()
	}
	return "server: " + e.Msg
}

func (e *Error) Unwrap() error { return e.Err }

// errorf builds an *Error of kind k with a formatted, showable message.
func errorf(k Kind, format string, args ...any) *Error {
	return &Error{Kind: k, Msg: fmt.Sprintf(format, args...)}
}

// statusOf maps an error to an HTTP status and the message the client sees.
// It is the one place that decides codes: handlers return errors and the
// echo error handler calls this.
func statusOf(err error) (int, string) {
	var e *Error
	var mbe *http.MaxBytesError
	switch {
	case errors.As(err, &mbe):
		return http.StatusRequestEntityTooLarge, fmt.Sprintf("upload larger than the %d-byte limit", mbe.Limit)
	case !errors.As(err, &e):
		return http.StatusInternalServerError, "internal error"
	}
	switch e.Kind {
	case KindInvalid:
		return http.StatusBadRequest, e.Msg
	case KindNotFound:
		return http.StatusNotFound, e.Msg
	case KindUnauthorized:
		return http.StatusUnauthorized, e.Msg
	case KindForbidden:
		return http.StatusForbidden, e.Msg
	case KindTooLarge:
		return http.StatusRequestEntityTooLarge, e.Msg
	case KindUnavailable:
		return http.StatusServiceUnavailable, e.Msg
	}
	return http.StatusInternalServerError, "internal error"
}

// logError logs err in full when it is an internal one (status 500).
func logError(log *slog.Logger, code int, method, path string, err error) {
	if code >= 500 {
		log.Error("request failed", "method", method, "path", path, "status", code, "err", err)
	}
}
