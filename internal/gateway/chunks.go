package gateway

import (
	"crypto/sha256"
	"encoding/hex"
	"hash"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// chunkSender cuts a byte stream into BackupResponse chunks, the first
// message's fields going out with the first chunk, and hashes what it sends.
type chunkSender struct {
	send  func(*pb.BackupResponse) error
	first *pb.BackupResponse // sent with the first chunk
	buf   []byte
	h     hash.Hash
}

func (c *chunkSender) Write(p []byte) (int, error) {
	if c.h == nil {
		c.h = sha256.New()
	}
	c.h.Write(p)
	n := len(p)
	for len(p) > 0 {
		k := min(cap(c.buf)-len(c.buf), len(p))
		c.buf = append(c.buf, p[:k]...)
		p = p[k:]
		if len(c.buf) == cap(c.buf) {
			if err := c.flush(); err != nil {
				return 0, err
			}
		}
	}
	return n, nil
}

func (c *chunkSender) flush() error {
	if len(c.buf) == 0 && c.first == nil {
		return nil
	}
	m := c.first
	if m == nil {
		m = &pb.BackupResponse{}
	}
	c.first = nil
	m.Chunk = c.buf
	err := c.send(m)
	c.buf = make([]byte, 0, cap(c.buf)) // the sent slice may still be referenced
	return err
}

func (c *chunkSender) sum() string {
	if c.h == nil {
		c.h = sha256.New()
	}
	return hex.EncodeToString(c.h.Sum(nil))
}
