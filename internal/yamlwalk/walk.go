package yamlwalk

import (
	"errors"
	"fmt"

	"go.yaml.in/yaml/v3"
)

// Error is a problem with the value at a key path of a YAML document.
type Error struct {
	Path string
	Msg  string
	Line int // line in the file, 0 if unknown
}

func (e *Error) Error() string {
	if e.Line > 0 {
		return fmt.Sprintf("%s: %s (line %d)", e.Path, e.Msg, e.Line)
	}
	return e.Path + ": " + e.Msg
}

// Errorf is an *Error at path, its line left for Mapping to fill in.
func Errorf(path, format string, args ...any) *Error {
	return &Error{Path: path, Msg: fmt.Sprintf(format, args...)}
}

// Join is the key path of key under path ("" is the document).
func Join(path, key string) string {
	if path == "" {
		return key
	}
	return path + "." + key
}

// Root names path in an error, the document itself when path is "".
func Root(path string) string {
	if path == "" {
		return "(document)"
	}
	return path
}

// Mapping walks the mapping node n at path, calling fn with each key, its
// value and the key's path, in file order. A node that is not a mapping and
// a key given twice are an *Error carrying the line. An *Error from fn
// without a line gets the value's line. The first error stops the walk.
func Mapping(n *yaml.Node, path string, fn func(key string, v *yaml.Node, path string) error) error {
	if n.Kind != yaml.MappingNode {
		return &Error{Path: Root(path), Msg: "want a mapping", Line: n.Line}
	}
	seen := map[string]bool{}
	for i := 0; i+1 < len(n.Content); i += 2 {
		k, v := n.Content[i], n.Content[i+1]
		kp := Join(path, k.Value)
		if seen[k.Value] {
			return &Error{Path: kp, Msg: "duplicate key", Line: k.Line}
		}
		seen[k.Value] = true
		if err := fn(k.Value, v, kp); err != nil {
			var e *Error
			if errors.As(err, &e) && e.Line == 0 {
				e.Line = v.Line
			}
			return err
		}
	}
	return nil
}

// Key is the key node of key in the mapping n (for its line), or nil.
func Key(n *yaml.Node, key string) *yaml.Node {
	for i := 0; i+1 < len(n.Content); i += 2 {
		if n.Content[i].Value == key {
			return n.Content[i]
		}
	}
	return nil
}
