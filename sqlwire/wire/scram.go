package wire

import (
	"crypto/hmac"
	"crypto/sha256"
	"fmt"

	"github.com/xdg-go/scram"
)

// SCRAM-SHA-256 (RFC 5802 with the SHA-256 hash of RFC 7677), as Postgres
// speaks it inside SASL authentication messages, comes from
// github.com/xdg-go/scram. The server keeps only salt, iteration count,
// StoredKey and ServerKey per user, derived at Start.

const (
	scramMechanism  = "SCRAM-SHA-256"
	scramIterations = 4096
	scramSaltLen    = 16
)

// newScramSecret derives what the server keeps for a password. The
// password is prepared with SASLprep (RFC 4013) as libpq prepares it, so
// that passwords outside ASCII work; one that SASLprep refuses (a
// prohibited or unassigned character) is used as its raw bytes, which is
// what libpq then sends.
func newScramSecret(password string, salt []byte, iters int) (scram.StoredCredentials, error) {
	client, err := scram.SHA256.NewClient("", password, "")
	if err != nil {
		if client, err = scram.SHA256.NewClientUnprepped("", password, ""); err != nil {
			return scram.StoredCredentials{}, fmt.Errorf("derive SCRAM key: %w", err)
		}
	}
	sec, err := client.GetStoredCredentialsWithError(scram.KeyFactors{Salt: string(salt), Iters: iters})
	if err != nil {
		return scram.StoredCredentials{}, fmt.Errorf("derive SCRAM key: %w", err)
	}
	return sec, nil
}

// secretFor returns the SCRAM secret of user, or a fake one (stable per
// user name, never matching) so that unknown users go through the same
// exchange and fail at the same step as a wrong password.
func (s *Server) secretFor(user string) (scram.StoredCredentials, bool) {
	if sec, ok := s.secrets[user]; ok {
		return sec, true
	}
	m := hmac.New(sha256.New, s.fakeKey)
	m.Write([]byte(user))
	sum := m.Sum(nil)
	return scram.StoredCredentials{KeyFactors: scram.KeyFactors{Salt: string(sum[:scramSaltLen]), Iters: scramIterations},
		StoredKey: make([]byte, sha256.Size), ServerKey: make([]byte, sha256.Size)}, false
}

// scramServer runs one exchange with the secret sec, whatever user name
// the client-first message carries: libpq sends an empty one, and the
// startup packet's user is the one authenticated.
func scramServer(sec scram.StoredCredentials) (*scram.ServerConversation, error) {
	srv, err := scram.SHA256.NewServer(func(string) (scram.StoredCredentials, error) { return sec, nil })
	if err != nil {
		return nil, err
	}
	return srv.NewConversation(), nil
}
