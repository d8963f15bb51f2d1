package alert

import (
	"embed"
	"fmt"
)

// schemaFiles holds the JSON Schemas (draft 2020-12) of the wire messages,
// one per kind. It is read-only.
//
//go:embed schema/*.json
var schemaFiles embed.FS

// Schema returns the JSON Schema (draft 2020-12) of messages of kind, one
// of KindTarget, KindCleared, KindFault, KindArmed and KindBeat. The slice
// is the caller's.
func Schema(kind string) ([]byte, error) {
	switch kind {
	case KindTarget, KindCleared, KindFault, KindArmed, KindBeat:
	default:
		return nil, fmt.Errorf("schema for kind %q: unknown kind; use one of %s, %s, %s, %s, %s",
			kind, KindTarget, KindCleared, KindFault, KindArmed, KindBeat)
	}
	b, err := schemaFiles.ReadFile("schema/" + kind + ".json")
	if err != nil {
		return nil, fmt.Errorf("schema for kind %q: %w", kind, err)
	}
	return b, nil
}
