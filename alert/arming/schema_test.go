package arming

import (
	"bytes"
	"testing"

	"github.com/santhosh-tekuri/jsonschema/v6"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
)

// validateMessage checks a message made here against alert's published
// JSON Schema of its kind.
func validateMessage(t *testing.T, kind string, m any) {
	t.Helper()
	raw, err := alert.Schema(kind)
	require.NoError(t, err)
	doc, err := jsonschema.UnmarshalJSON(bytes.NewReader(raw))
	require.NoError(t, err)
	c := jsonschema.NewCompiler()
	c.DefaultDraft(jsonschema.Draft2020)
	c.AssertFormat()
	url := "urn:stillwater:alert:" + kind + ":v1"
	require.NoError(t, c.AddResource(url, doc))
	s, err := c.Compile(url)
	require.NoError(t, err)
	b, err := alert.Encode(m)
	require.NoError(t, err)
	v, err := jsonschema.UnmarshalJSON(bytes.NewReader(b))
	require.NoError(t, err)
	assert.NoError(t, s.Validate(v), "%s", b)
}
