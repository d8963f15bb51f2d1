package bus_test

import (
	"context"
	"encoding/json"
	"fmt"
	"log"
	"os"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"stillwater/alert"
	"stillwater/alert/bus"
)

// A responder: a separate program that pages someone on every new target,
// including those stored while it was not running. It needs only nats.go
// and the JSON field names of the wire messages. It logs in as a
// responder-role user, pager, and reads the durable consumer stillwater
// keeps for it on the STILLWATER stream.
func Example_responder() {
	url, stop := exampleBus() // stillwater's side; a target is already stored
	defer stop()

	nc, err := nats.Connect(url, nats.UserInfo("pager", "pager-password"))
	if err != nil {
		log.Fatal(err)
	}
	defer nc.Close()
	js, err := jetstream.New(nc)
	if err != nil {
		log.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	cons, err := js.Consumer(ctx, "STILLWATER", "pager") // named after the bus user
	if err != nil {
		log.Fatal(err)
	}

	type message struct {
		Kind    string `json:"kind"`
		Camera  string `json:"camera"`
		Event   string `json:"event"`
		Surface struct {
			X float64 `json:"x_m"`
			Y float64 `json:"y_m"`
		} `json:"surface"`
		Confidence float64 `json:"confidence"`
	}
	// A long-running responder would call cons.Consume with a callback;
	// this one takes what is waiting and stops.
	batch, err := cons.Fetch(1, jetstream.FetchMaxWait(10*time.Second))
	if err != nil {
		log.Fatal(err)
	}
	for m := range batch.Messages() {
		var msg message
		if err := json.Unmarshal(m.Data(), &msg); err != nil {
			log.Printf("%s: %v", m.Subject(), err)
		} else if msg.Kind == "target" && msg.Event == "start" {
			fmt.Printf("PERSON IN THE POOL (%s) at %.1f m, %.1f m, confidence %.2f\n", msg.Camera, msg.Surface.X, msg.Surface.Y, msg.Confidence)
		}
		// Acknowledged messages are not delivered to pager again.
		if err := m.DoubleAck(ctx); err != nil {
			log.Fatal(err)
		}
	}
	// Output:
	// PERSON IN THE POOL (north) at 3.2 m, 1.5 m, confidence 0.86
}

// exampleBus plays stillwater's part: an embedded server with a daemon
// and a responder user, a publisher that keeps a durable consumer for the
// responder, and one target published before the responder connects.
func exampleBus() (url string, stop func()) {
	dir, err := os.MkdirTemp("", "stillwater-example-")
	if err != nil {
		log.Fatal(err)
	}
	emb, err := bus.StartEmbedded(bus.EmbeddedConfig{Listen: "127.0.0.1:-1", StoreDir: dir, Prefix: "stillwater", Users: []bus.User{
		{Name: "stillwater", Password: "daemon-password", Role: bus.RoleDaemon},
		{Name: "pager", Password: "pager-password", Role: bus.RoleResponder}}})
	if err != nil {
		log.Fatal(err)
	}
	nc, err := nats.Connect(emb.URL(), nats.UserInfo("stillwater", "daemon-password"))
	if err != nil {
		log.Fatal(err)
	}
	p, err := bus.NewPublisherWith(context.Background(), nc, bus.PublisherConfig{Prefix: "stillwater", Consumers: []string{"pager"}})
	if err != nil {
		log.Fatal(err)
	}
	at := time.Date(2026, 6, 10, 16, 30, 0, 0, time.UTC)
	b, err := alert.Encode(alert.Target{V: alert.Version, Kind: alert.KindTarget, Camera: "north", Track: 7, Seq: 1, Event: "start",
		Time: at, FrameTime: at, Surface: alert.Position{X: 3.25, Y: 1.5}, Confidence: 0.857})
	if err != nil {
		log.Fatal(err)
	}
	if err := p.Publish(context.Background(), "north", alert.KindTarget, "example-1", b); err != nil {
		log.Fatal(err)
	}
	return emb.URL(), func() {
		p.Close()
		nc.Close()
		emb.Shutdown()
		os.RemoveAll(dir)
	}
}
