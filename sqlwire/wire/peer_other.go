//go:build !linux

package wire

import "net"

// peerClosed cannot look at the connection without reading it on this
// system: a disconnected client is noticed when its rows are written.
func peerClosed(net.Conn) bool { return false }
