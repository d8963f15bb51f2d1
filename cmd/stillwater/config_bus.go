package main

import (
	"errors"
	"fmt"

	"stillwater/alert"
)

// BusConfig selects the message bus: the embedded server when URL is empty.
type BusConfig struct {
	URL    string `yaml:"url"`
	Listen string `yaml:"listen"` // embedded server's client listener
	MQTT   string `yaml:"mqtt"`   // embedded server's MQTT listener; empty is off
	Prefix string `yaml:"subject_prefix"`
}

// validateBus checks the bus section.
func validateBus(b BusConfig) error {
	if b.URL == "" && b.Listen == "" {
		return errors.New("bus: neither url nor listen is set; set url for an external server or listen for the embedded one")
	}
	if err := alert.ValidToken(b.Prefix); err != nil {
		return fmt.Errorf("bus.subject_prefix: %v; use a single word such as stillwater", err)
	}
	return nil
}

// ControlConfig is who may arm and disarm, over HTTP and NATS.
type ControlConfig struct{}
