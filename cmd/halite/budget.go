package main

import (
	"errors"
	"fmt"
	"math"
	"os"
	"runtime/debug"
	"strconv"
	"strings"
)

// BudgetConfig bounds the outside data calls hold (request bodies and FHIR
// answers), so that no mix of calls can take the process past its memory
// limit: process_bytes for all calls in flight together, call_bytes for
// what one call reads from FHIR servers (every key, page and Medication
// read). A call that finds a budget spent is never kept waiting: the data
// it could not read is reported as missing (412 when a required key is
// lost to its own budget, 503 when other calls hold the process's).
type BudgetConfig struct {
	ProcessBytes int64 `yaml:"process_bytes"`
	CallBytes    int64 `yaml:"call_bytes"`
}

// fallbackMemoryLimit is assumed when neither GOMEMLIMIT nor a cgroup
// limit tells the process its memory.
const fallbackMemoryLimit = 256 << 20

// memoryLimit is the limit the process runs under: the Go runtime's
// (GOMEMLIMIT), else the cgroup's (memory.max), else 0 (unknown).
func memoryLimit() int64 {
	if l := debug.SetMemoryLimit(-1); l > 0 && l < math.MaxInt64 {
		return l
	}
	data, err := os.ReadFile("/sys/fs/cgroup/memory.max")
	if err != nil {
		return 0
	}
	l, err := strconv.ParseInt(strings.TrimSpace(string(data)), 10, 64)
	if err != nil || l <= 0 {
		return 0 // "max": no limit
	}
	return l
}

// deriveBudgets fills the byte budgets left unset from the memory limit
// (0: unknown, fallbackMemoryLimit assumed): a fifth of it for all calls'
// data, a quarter of that for one call, and one FHIR answer at most the
// call's budget and 32 MiB. Measured (README, Reliability): parsing makes
// the heap hold about three times the bytes read, so a fifth keeps the
// peak well inside the limit.
func (c *Config) deriveBudgets(limit int64) {
	if limit <= 0 {
		limit = fallbackMemoryLimit
	}
	c.memoryLimit = limit
	if c.Budget.ProcessBytes == 0 {
		c.Budget.ProcessBytes = limit / 5
	}
	if c.Budget.CallBytes == 0 && c.Budget.ProcessBytes > 0 {
		c.Budget.CallBytes = c.Budget.ProcessBytes / 4
	}
	if c.FHIRClient.MaxResponseBytes == 0 && c.Budget.CallBytes > 0 {
		c.FHIRClient.MaxResponseBytes = min(32<<20, c.Budget.CallBytes)
	}
}

// validateBudgets checks the budgets against each other and the memory
// limit, naming the key at fault.
func (c Config) validateBudgets() error {
	b := c.Budget
	switch {
	case b.ProcessBytes <= 0:
		return errors.New("config: budget.process_bytes: must be positive")
	case c.memoryLimit > 0 && b.ProcessBytes > c.memoryLimit/2:
		return fmt.Errorf("config: budget.process_bytes: %d is more than half the memory limit (%d bytes, from GOMEMLIMIT or the cgroup); "+
			"parsed data takes a few times its size", b.ProcessBytes, c.memoryLimit)
	case b.CallBytes <= 0 || b.CallBytes > b.ProcessBytes:
		return fmt.Errorf("config: budget.call_bytes: must be positive and at most budget.process_bytes (%d)", b.ProcessBytes)
	case c.FHIRClient.MaxResponseBytes <= 0:
		return errors.New("config: fhir_client.max_response_bytes: must be positive (0 derives it from budget.call_bytes)")
	case c.FHIRClient.MaxResponseBytes > b.CallBytes:
		return fmt.Errorf("config: fhir_client.max_response_bytes: %d is more than budget.call_bytes (%d): such an answer could never be read",
			c.FHIRClient.MaxResponseBytes, b.CallBytes)
	case c.MaxBodyBytes > b.ProcessBytes:
		return fmt.Errorf("config: max_body_bytes: %d is more than budget.process_bytes (%d): such a request could never be held",
			c.MaxBodyBytes, b.ProcessBytes)
	}
	return nil
}
