package main

import (
	"encoding/json"
	"io"

	"google.golang.org/protobuf/encoding/protojson"
	"google.golang.org/protobuf/proto"
)

// writeProtoJSON writes messages as one indented JSON array, each in its
// protojson form (opts, when given, chooses field names and defaults).
func writeProtoJSON[M proto.Message](w io.Writer, ms []M, opts ...protojson.MarshalOptions) error {
	var mo protojson.MarshalOptions
	if len(opts) > 0 {
		mo = opts[0]
	}
	arr := make([]json.RawMessage, 0, len(ms))
	for _, m := range ms {
		b, err := mo.Marshal(m)
		if err != nil {
			return err
		}
		arr = append(arr, b)
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(arr)
}
