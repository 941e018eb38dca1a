// Package batonpb holds Baton's wire messages, generated from baton.proto.
package batonpb

//go:generate protoc --go_out=. --go_opt=paths=source_relative baton.proto model.proto
