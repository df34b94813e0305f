// Package browser holds genvelope's browser test: the operator pages of
// an in-process server on loopback, fed over gRPC and driven in Debian's
// Chromium, headless, over the DevTools protocol (chromedp).
//
// Install the browser with apt-get install chromium. Without it the test
// skips, saying so, except when CI=true, where it fails. Under -short it
// skips. Screenshots go to the directory named by GENVELOPE_ARTIFACTS, or
// to a temporary directory; the test logs where.
package browser
