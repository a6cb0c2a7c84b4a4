package app

import (
	"net"
	"sync"

	"github.com/prometheus/client_golang/prometheus"
)

// countingListener tracks open connections in a gauge.
func countingListener(l net.Listener, g prometheus.Gauge) net.Listener {
	return &counting{Listener: l, g: g}
}

type counting struct {
	net.Listener
	g prometheus.Gauge
}

func (l *counting) Accept() (net.Conn, error) {
	c, err := l.Listener.Accept()
	if err != nil {
		return nil, err
	}
	l.g.Inc()
	return &countedConn{Conn: c, g: l.g}, nil
}

type countedConn struct {
	net.Conn
	g    prometheus.Gauge
	once sync.Once
}

func (c *countedConn) Close() error {
	c.once.Do(c.g.Dec)
	return c.Conn.Close()
}

// limitListener refuses connections beyond max (0: no limit) by closing
// them at once.
func limitListener(l net.Listener, max int) net.Listener {
	if max <= 0 {
		return l
	}
	return &limited{Listener: l, sem: make(chan struct{}, max)}
}

type limited struct {
	net.Listener
	sem chan struct{}
}

func (l *limited) Accept() (net.Conn, error) {
	for {
		c, err := l.Listener.Accept()
		if err != nil {
			return nil, err
		}
		select {
		case l.sem <- struct{}{}:
			return &releasing{Conn: c, release: func() { <-l.sem }}, nil
		default:
			c.Close()
		}
	}
}

type releasing struct {
	net.Conn
	release func()
	once    sync.Once
}

func (c *releasing) Close() error {
	c.once.Do(c.release)
	return c.Conn.Close()
}
