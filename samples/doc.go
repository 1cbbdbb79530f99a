// Package samples generates invented demo scenarios, with ground truth, so
// the watcher can be tried and tested without real data.
//
// Every frame is computed from the scenario's seed and the frame index
// alone, so any frame can be made on demand (a few milliseconds) and the same
// seed gives the same bytes. The scene layout (gradient, stars, where the
// change happens) is fixed per scenario; the seed only drives the noise.
//
// Both scenarios are our own stories, not recordings:
//
//   - furnace: a 16-bit mid-wave thermal camera looks at the refractory wall
//     of a furnace, 320 x 240. The wall is 1050-1150 K with a smooth gradient;
//     counts follow Wien's approximation of Planck's law at 3.9 µm, the optics
//     darken the corners by the cos^4 law, each pixel has a small fixed gain
//     error, and the wall temperature drifts by 0.05 K. Sensor
//     noise is read noise plus shot noise, so its variance grows linearly with
//     the signal. At the change frame the lining starts to thin at one place:
//     a hot spot a few kelvin warmer (about 1.6 noise sigma) appears and its
//     radius grows from 3 to 8 pixels.
//   - starfield: a 16-bit patrol camera on a telescope, 512 x 512, registered
//     frames. Stars with a Gaussian point-spread function and power-law
//     brightness (many faint, few bright, none saturated) sit on a sky
//     with a faint gradient; noise is read noise plus Poisson noise. At the
//     change frame a faint source (2.5 sky sigma at its centre pixel) brightens
//     over a dozen frames, holds, and fades to nothing at the end frame.
//
// Truth reports where and when the change is, in the same frame and pixel
// conventions as the scan report (frames count from 0, boxes inclusive).
package samples
