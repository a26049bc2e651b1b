//go:build !(js && wasm)

package main

import (
	"encoding/json"
	"fmt"
	"io"
	"os"

	"github.com/halite-cds/halite/rules"
)

// main, outside the browser, reads one CourseRequest on stdin and writes
// its Course on stdout: the same computation, for trying it by hand.
func main() {
	if err := runCLI(os.Stdin, os.Stdout); err != nil {
		fmt.Fprintln(os.Stderr, "halite-wasm:", err)
		os.Exit(1)
	}
}

func runCLI(in io.Reader, out io.Writer) error {
	rs, err := rules.Load()
	if err != nil {
		return err
	}
	var req CourseRequest
	if err := json.NewDecoder(in).Decode(&req); err != nil {
		return fmt.Errorf("request: %w", err)
	}
	c, err := ComputeCourse(rs, req)
	if err != nil {
		return err
	}
	enc := json.NewEncoder(out)
	enc.SetIndent("", "  ")
	return enc.Encode(c)
}
