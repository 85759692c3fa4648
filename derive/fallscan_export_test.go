package derive

// HeldReadings is how many readings a scan keeps for the rest of the
// series, for the test that a saved scan stays bounded.
func HeldReadings(s *FallScan) int {
	n := len(s.base.readings) + len(s.seen)
	for _, ep := range []*episode{s.ep, s.next} {
		if ep != nil {
			n += len(ep.level.readings) + len(ep.readings)
		}
	}
	return n
}
