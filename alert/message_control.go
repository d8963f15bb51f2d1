package alert

import (
	"fmt"
	"strings"
)

// Control actions: the last token of a control subject and of the HTTP
// path /control/ACTION.
const (
	ActionArm    = "arm"
	ActionDisarm = "disarm"
	ActionClear  = "clear"
	ActionStatus = "status"
)

// AllCameras addresses every camera in control requests.
const AllCameras = "all"

// controlToken is the subject token under the prefix that carries control
// requests.
const controlToken = "control"

// UserControlSubject returns the subject on which bus user sends a control
// action: PREFIX.control.USER.ACTION. The server's permissions let only
// that user publish there, so the subject names who sent the request.
func UserControlSubject(prefix, user, action string) string {
	return prefix + "." + controlToken + "." + user + "." + action
}

// ControlSubject returns the shared subject of a control action,
// PREFIX.control.ACTION. Anyone allowed to publish there may, so a request
// on it names no sender: it must carry the control token to change state.
func ControlSubject(prefix, action string) string {
	return prefix + "." + controlToken + "." + action
}

// ControlSubjects returns the subject patterns of every control request
// under prefix, shared and per-user.
func ControlSubjects(prefix string) []string {
	return []string{ControlSubject(prefix, "*"), UserControlSubject(prefix, "*", "*")}
}

// ParseControlSubject splits a control subject under prefix into the
// sending user ("" on the shared subject) and the action. ok is false for
// any other subject.
func ParseControlSubject(prefix, subject string) (user, action string, ok bool) {
	rest, found := strings.CutPrefix(subject, prefix+"."+controlToken+".")
	if !found || rest == "" {
		return "", "", false
	}
	user, action, two := strings.Cut(rest, ".")
	if !two {
		return "", rest, true
	}
	if user == "" || action == "" || ValidToken(action) != nil {
		return "", "", false
	}
	return user, action, true
}

// ReservedCamera returns an error for camera ids that clash with the
// control subjects: "all" addresses every camera and "control" is the
// subject token of control requests (PREFIX.control.…).
func ReservedCamera(id string) error {
	switch id {
	case AllCameras:
		return fmt.Errorf("camera id %q is reserved for addressing every camera", id)
	case controlToken:
		return fmt.Errorf("camera id %q is reserved: PREFIX.control.* carries control requests", id)
	}
	return nil
}
