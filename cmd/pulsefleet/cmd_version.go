package main

import (
	"context"
	"fmt"
	"runtime"
	"runtime/debug"
)

// version is set at build time with -ldflags "-X main.version=...".
var version = "dev"

func init() {
	register(command{
		name:    "version",
		summary: "Print the version of this binary and of Go it was built with.",
		run: func(ctx context.Context, args []string, s stdio) error {
			fs := newFlagSet("version", "", s.err)
			if err := parseFlags(fs, args); err != nil {
				return err
			}
			v := version
			if bi, ok := debug.ReadBuildInfo(); ok && v == "dev" && bi.Main.Version != "" && bi.Main.Version != "(devel)" {
				v = bi.Main.Version
			}
			fmt.Fprintf(s.out, "pulsefleet %s (%s, %s/%s)\n", v, runtime.Version(), runtime.GOOS, runtime.GOARCH)
			return nil
		},
	})
}
