package server

import (
	"context"
)

// defaultReview runs a session's frames through the review. It is replaced
// by the shared review loop once that lands.
func defaultReview(ctx context.Context, s *Session) (*Report, error) {
	return nil, errorf(KindUnavailable, "reviews are not available in this build yet")
}

// CreateDemo makes a session from a demo scenario.
func (s *Server) CreateDemo(scenario, name string, p Params) (*Session, error) {
	return nil, errorf(KindUnavailable, "demo scenarios are not available in this build yet")
}

// seek sends viewer v a preview of frame f.
func (sess *Session) seek(v *viewer, f int) {}

// EnsureDemo returns the owner URL of a session of the named demo scenario,
// making one when none exists yet ("default" picks the first scenario).
func (s *Server) EnsureDemo(scenario string) (string, error) {
	return "", errorf(KindUnavailable, "demo scenarios are not available in this build yet")
}
