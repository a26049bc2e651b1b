package main

import (
	"fmt"
	"io"
	"net/http"
	"time"
)

// healthcheck asks a running halite for /healthz, for container health
// checks in an image without a shell: exit 0 when it answers 200.
func healthcheck(args []string, stdout, stderr io.Writer) error {
	fs := newFlags("healthcheck", "healthcheck [--url URL]", stderr)
	url := fs.String("url", "http://127.0.0.1:8080/healthz", "the health `URL` to ask")
	if _, err := parseFlags(fs, args); err != nil {
		return err
	}
	c := &http.Client{Timeout: 3 * time.Second}
	resp, err := c.Get(*url)
	if err != nil {
		return fmt.Errorf("healthcheck: %w", err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		return fmt.Errorf("healthcheck: %s answered %d", *url, resp.StatusCode)
	}
	fmt.Fprintln(stdout, "ok")
	return nil
}
