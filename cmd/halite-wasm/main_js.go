//go:build js && wasm

package main

import (
	"encoding/json"
	"syscall/js"

	"github.com/halite-cds/halite/rules"
)

// main registers haliteCourse(requestJSON) → courseJSON on the page and
// stays to answer it. An error is returned as {"error": "..."}.
func main() {
	rs, err := rules.Load()
	if err != nil {
		js.Global().Set("haliteError", err.Error())
		return
	}
	js.Global().Set("haliteCourse", js.FuncOf(func(_ js.Value, args []js.Value) any {
		if len(args) != 1 || args[0].Type() != js.TypeString {
			return `{"error":"haliteCourse takes one JSON string"}`
		}
		return answer(rs, []byte(args[0].String()))
	}))
	js.Global().Set("haliteRuleset", rs.Revision())
	select {}
}

// answer is the JSON answer to one request.
func answer(rs *rules.Ruleset, body []byte) string {
	var req CourseRequest
	if err := json.Unmarshal(body, &req); err != nil {
		return errorJSON(err)
	}
	c, err := ComputeCourse(rs, req)
	if err != nil {
		return errorJSON(err)
	}
	out, err := json.Marshal(c)
	if err != nil {
		return errorJSON(err)
	}
	return string(out)
}

func errorJSON(err error) string {
	b, _ := json.Marshal(map[string]string{"error": err.Error()})
	return string(b)
}
