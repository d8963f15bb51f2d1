package bus_test

import (
	"encoding/json"
	"fmt"
	"log"
	"os"
	"time"

	"github.com/nats-io/nats.go"
)

// A responder: a separate program that pages someone on every new target.
// It needs only nats.go and the JSON field names of the wire messages.
func Example_responder() {
	nc, err := nats.Connect("nats://127.0.0.1:4222",
		nats.UserInfo("pager", os.Getenv("PAGER_BUS_PASSWORD")), // a responder-role user
		nats.MaxReconnects(-1))
	if err != nil {
		log.Fatal(err)
	}
	defer nc.Close()

	type target struct {
		Camera  string    `json:"camera"`
		Event   string    `json:"event"`
		Time    time.Time `json:"time"`
		Surface struct {
			X float64 `json:"x_m"`
			Y float64 `json:"y_m"`
		} `json:"surface"`
		Confidence float64 `json:"confidence"`
	}
	_, err = nc.Subscribe("stillwater.*.target", func(m *nats.Msg) {
		var t target
		if err := json.Unmarshal(m.Data, &t); err != nil {
			log.Printf("%s: %v", m.Subject, err)
			return
		}
		if t.Event == "start" {
			fmt.Printf("PERSON IN THE POOL (%s) at %.1f m, %.1f m, confidence %.2f\n", t.Camera, t.Surface.X, t.Surface.Y, t.Confidence)
		}
	})
	if err != nil {
		log.Fatal(err)
	}

	// Ask whether the cameras are armed (allowed for responders).
	reply, err := nc.Request("stillwater.control.status", nil, 2*time.Second)
	if err == nil {
		fmt.Println(string(reply.Data))
	}
	select {} // keep listening
}
