// Package onnxpb holds Go bindings generated from the ONNX protobuf schema
// (onnx.proto, ONNX 1.12, copied from Debian python3-onnx 1.12.0). The
// generated file is committed so a build needs neither protoc nor the plugin;
// rerun the line below (protoc 3.21 from Debian protobuf-compiler,
// protoc-gen-go v1.36.12) after replacing onnx.proto.
package onnxpb

//go:generate protoc --go_out=. --go_opt=paths=source_relative --go_opt=Monnx.proto=heedmap/onnx/onnxpb onnx.proto
