package engine

// WakeWriter asks the outbox writer for a pass now instead of at its next
// timer, as after an operator moved a dead letter back to the outbox.
func (e *Engine) WakeWriter() { signal(e.flush) }
