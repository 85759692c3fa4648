package derive

// HeldReadings is how many readings a scan keeps for the rest of the
// series, for the test that a saved scan stays bounded.
func HeldReadings(s *FallScan) int { return len(s.eligible) + len(s.seen) }
