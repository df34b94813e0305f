// Package api holds the Go code generated from the protobuf API in
// proto/. The generated package is api/genvelope/v1 (genvelopev1).
//
// Regenerate it after any change to proto/, from the repository root:
//
//	go generate ./api
//
// This removes api/genvelope and runs buf (pinned, through go run) from
// the repository root with buf.gen.yaml. Only Go is needed.
// .ci/proto-check fails when the committed code is out of date.
package api

//go:generate rm -rf genvelope
//go:generate go -C .. run github.com/bufbuild/buf/cmd/buf@v1.75.0 generate
