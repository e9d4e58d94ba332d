package sqlwire

import (
	"crypto/hmac"
	"crypto/pbkdf2"
	"crypto/rand"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/base64"
	"errors"
	"fmt"
	"strconv"
	"strings"
)

// SCRAM-SHA-256 (RFC 5802 with the SHA-256 hash of RFC 7677), server side,
// as Postgres speaks it inside SASL authentication messages:
//
//	SaltedPassword  = PBKDF2-HMAC-SHA-256(password, salt, i)
//	ClientKey       = HMAC(SaltedPassword, "Client Key")
//	StoredKey       = H(ClientKey)
//	ServerKey       = HMAC(SaltedPassword, "Server Key")
//	AuthMessage     = client-first-bare + "," + server-first + "," + client-final-without-proof
//	ClientSignature = HMAC(StoredKey, AuthMessage)
//	ClientProof     = ClientKey XOR ClientSignature
//	ServerSignature = HMAC(ServerKey, AuthMessage)
//
// The server keeps only salt, iteration count, StoredKey and ServerKey; it
// checks a proof by recovering ClientKey = ClientProof XOR ClientSignature
// and comparing H(ClientKey) with StoredKey.

const (
	scramMechanism  = "SCRAM-SHA-256"
	scramIterations = 4096
	scramSaltLen    = 16
)

// scramSecret is what the server stores for one user.
type scramSecret struct {
	salt      []byte
	iters     int
	storedKey []byte
	serverKey []byte
}

// newScramSecret derives a user's secret from the password. Passwords are
// used as given: for ASCII passwords that is what libpq sends after
// SASLprep, which is why non-ASCII passwords are refused when the
// credentials are loaded.
func newScramSecret(password string, salt []byte, iters int) (*scramSecret, error) {
	salted, err := pbkdf2.Key(sha256.New, password, salt, iters, sha256.Size)
	if err != nil {
		return nil, fmt.Errorf("derive SCRAM key: %w", err)
	}
	clientKey := hmacSHA256(salted, []byte("Client Key"))
	stored := sha256.Sum256(clientKey)
	return &scramSecret{
		salt:      salt,
		iters:     iters,
		storedKey: stored[:],
		serverKey: hmacSHA256(salted, []byte("Server Key")),
	}, nil
}

func hmacSHA256(key, msg []byte) []byte {
	m := hmac.New(sha256.New, key)
	m.Write(msg)
	return m.Sum(nil)
}

// scramExchange is one authentication in progress.
type scramExchange struct {
	secret          *scramSecret
	gs2Header       string
	clientFirstBare string
	serverFirst     string
	nonce           string // client nonce + server nonce
}

var errSCRAMFormat = errors.New("malformed SCRAM message")

// newServerNonce returns the random part the server adds to the nonce.
func newServerNonce() (string, error) {
	b := make([]byte, 18)
	if _, err := rand.Read(b); err != nil {
		return "", fmt.Errorf("SCRAM nonce: %w", err)
	}
	return base64.StdEncoding.EncodeToString(b), nil
}

// clientFirst reads the client-first-message, "n,,n=user,r=nonce": a GS2
// header (no channel binding, no authorization identity) and the bare part,
// and builds the server-first-message with serverNonce appended to the
// client's nonce. libpq sends an empty user name; the startup packet's user
// is the one authenticated.
func (x *scramExchange) clientFirst(msg, serverNonce string) error {
	var rest string
	switch {
	case strings.HasPrefix(msg, "n,"), strings.HasPrefix(msg, "y,"):
		// "y": the client could bind to the channel but the server did not
		// offer SCRAM-SHA-256-PLUS, which is true.
		rest = msg[2:]
	case strings.HasPrefix(msg, "p="):
		return errors.New("SCRAM channel binding is not supported by this server: connect with channel_binding=disable or prefer")
	default:
		return errSCRAMFormat
	}
	authzid, bare, ok := strings.Cut(rest, ",")
	if !ok {
		return errSCRAMFormat
	}
	if authzid != "" {
		return errors.New("SCRAM authorization identities are not supported")
	}
	x.gs2Header = msg[:len(msg)-len(bare)]
	x.clientFirstBare = bare
	attrs := strings.Split(bare, ",")
	if len(attrs) < 2 || !strings.HasPrefix(attrs[0], "n=") || !strings.HasPrefix(attrs[1], "r=") {
		return errSCRAMFormat
	}
	clientNonce := attrs[1][2:]
	if clientNonce == "" || !printableNonce(clientNonce) {
		return errSCRAMFormat
	}
	x.nonce = clientNonce + serverNonce
	x.serverFirst = "r=" + x.nonce + ",s=" + base64.StdEncoding.EncodeToString(x.secret.salt) +
		",i=" + strconv.Itoa(x.secret.iters)
	return nil
}

// printableNonce reports whether s holds only printable ASCII other than
// ',' (RFC 5802's "printable").
func printableNonce(s string) bool {
	for i := 0; i < len(s); i++ {
		if s[i] < 0x21 || s[i] > 0x7e || s[i] == ',' {
			return false
		}
	}
	return true
}

// clientFinal checks the client-final-message "c=biws,r=nonce,p=proof" and
// returns the server-final-message "v=signature" when the proof is right.
// ok is false for a wrong password; err is set for a malformed message.
func (x *scramExchange) clientFinal(msg string) (serverFinal string, ok bool, err error) {
	idx := strings.LastIndex(msg, ",p=")
	if idx < 0 {
		return "", false, errSCRAMFormat
	}
	withoutProof, proofB64 := msg[:idx], msg[idx+3:]
	attrs := strings.Split(withoutProof, ",")
	if len(attrs) < 2 || !strings.HasPrefix(attrs[0], "c=") || !strings.HasPrefix(attrs[1], "r=") {
		return "", false, errSCRAMFormat
	}
	binding, err := base64.StdEncoding.DecodeString(attrs[0][2:])
	if err != nil || string(binding) != x.gs2Header {
		return "", false, errors.New("SCRAM channel binding does not match the client-first message")
	}
	if attrs[1][2:] != x.nonce {
		return "", false, errors.New("SCRAM nonce does not match")
	}
	proof, err := base64.StdEncoding.DecodeString(proofB64)
	if err != nil || len(proof) != sha256.Size {
		return "", false, errSCRAMFormat
	}
	authMessage := []byte(x.clientFirstBare + "," + x.serverFirst + "," + withoutProof)
	clientSignature := hmacSHA256(x.secret.storedKey, authMessage)
	clientKey := make([]byte, sha256.Size)
	for i := range clientKey {
		clientKey[i] = proof[i] ^ clientSignature[i]
	}
	got := sha256.Sum256(clientKey)
	if subtle.ConstantTimeCompare(got[:], x.secret.storedKey) != 1 {
		return "", false, nil
	}
	return "v=" + base64.StdEncoding.EncodeToString(hmacSHA256(x.secret.serverKey, authMessage)), true, nil
}
