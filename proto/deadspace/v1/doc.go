// Package deadspacev1 is the Go code generated from deadspace.proto, the
// gRPC API of the deadspace live service (package deadspace.v1). The
// server is in api/grpcapi; regenerate with .ci/gen-proto.
package deadspacev1
