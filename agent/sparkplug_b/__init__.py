"""The Sparkplug B payload schema (Eclipse Sparkplug 3.0), EPL-2.0: see NOTICE.md here.

`sparkplug_b.proto` is the specification's schema (the comments trimmed); the module
`sparkplug_b_pb2` is what protoc generates from it (protobuf's own Python runtime, upb,
parses it in C). Nothing else of watchkeep is under this licence.
"""
