// Package frames turns bytes into frames of float32 values for the engine:
// image decoders (PNG, JPEG, GIF, BMP, TIFF, WebP; FITS in frames/fits),
// sources that yield frames in order (folder, .zip, a pipe of concatenated
// images, synthetic), and k x k tiling of a frame into streams.
//
// Colour is converted once, at the edge, to luma with the ITU-R BT.601
// weights; values stay in the file's native units (0..255 for 8-bit,
// 0..65535 for 16-bit, physical values for FITS) and NaN marks a missing
// pixel.
package frames
