// Package server is the watcher's HTTP side: sessions that review frames in
// one goroutine each, a hub that fans frame updates out to websocket viewers
// without ever blocking the review, share links, and a data directory that
// keeps sessions, alarms and statistics across restarts.
//
// Echo stays inside this package; callers see only New, Handler and Serve.
package server
