// Package live delivers frames from sources that keep producing them: a
// camera URL (MJPEG over HTTP, or a single-image URL polled) fetched only
// under an operator's allow-list, and a folder watched for new frame files.
//
// Sources hand over encoded bytes (JPEG, PNG, ...) on a bounded channel and
// leave decoding to the consumer. A camera never waits for a slow consumer:
// when the queue is full its oldest frame is dropped and counted, so the
// consumer always sees the freshest frames. A watched folder waits instead,
// because its files stay on disk, unless told to drop.
//
// Use:
//
//	allow, err := live.NewAllowList(prefixes...)   // e.g. from --allow-camera-url
//	cam, err := live.NewCamera(live.CameraConfig{URL: u, Allow: allow, Events: onEvent})
//	// a URL outside the list gives a *live.RefusedError before any fetch
//	go cam.Run(ctx)                                // returns *RefusedError on a bad redirect
//	for f := range cam.Frames() {                  // closed when Run returns
//		frames.Decode(f.Data, maxPixels, dst)
//	}
//	cam.Counts()                                   // received, queued, dropped, bad, reconnects
//
// NewFolder and Folder.Run work the same way for a folder inside a root.
package live
