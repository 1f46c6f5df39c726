"""Generated leadline v1 wire contract (protobuf + gRPC stubs)."""
