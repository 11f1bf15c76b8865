// Package docs holds no code: docs/contracts.md (file formats, profile
// semantics, command-line promises, how the caution travels) and
// docs/references.md (every published value the tests check against, with
// its source) live here. Its test checks that every citation in the
// repository points at a file, and a section, that exists.
package docs
