package vae

// Programs are pooled per key. A caller checks one out, uses it alone and
// returns it; a new one is built when none is free. This is what makes the
// inference methods safe for concurrent use: no two goroutines ever run the
// same graph, and every graph reads the same parameter tensors, which only
// training writes.

func (m *Model) acquire(key programKey) (*program, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	if free := m.pools[key]; len(free) > 0 {
		p := free[len(free)-1]
		m.pools[key] = free[:len(free)-1]
		return p, nil
	}
	m.engine.Lock()
	defer m.engine.Unlock()
	return m.build(key)
}

func (m *Model) release(p *program) {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.pools[p.key] = append(m.pools[p.key], p)
}

// dropPrograms forgets every pooled program (after parameters are replaced
// by new tensors, as on load).
func (m *Model) dropPrograms() {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.pools = map[programKey][]*program{}
}
