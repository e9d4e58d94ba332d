package sqlwire

import (
	"crypto/hmac"
	"crypto/pbkdf2"
	"crypto/sha256"
	"encoding/base64"
	"fmt"
	"net"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgproto3"
)

// scramClientProof computes the client side of SCRAM-SHA-256 from RFC 5802
// section 3: ClientProof = ClientKey XOR HMAC(H(ClientKey), AuthMessage),
// and the ServerSignature the server must answer with.
func scramClientProof(password string, salt []byte, iters int, authMessage string) (proof, serverSig []byte) {
	salted := saltedPassword(password, salt, iters)
	clientKey := hmacSHA256(salted, []byte("Client Key"))
	stored := sha256.Sum256(clientKey)
	sig := hmacSHA256(stored[:], []byte(authMessage))
	proof = make([]byte, 32)
	for i := range proof {
		proof[i] = clientKey[i] ^ sig[i]
	}
	return proof, hmacSHA256(hmacSHA256(salted, []byte("Server Key")), []byte(authMessage))
}

func hmacSHA256(key, msg []byte) []byte {
	m := hmac.New(sha256.New, key)
	m.Write(msg)
	return m.Sum(nil)
}

var (
	saltedMu    sync.Mutex
	saltedCache = map[string][]byte{}
)

// saltedPassword is PBKDF2-HMAC-SHA-256, cached: the fuzz target logs in
// thousands of times to the same server.
func saltedPassword(password string, salt []byte, iters int) []byte {
	key := password + "\x00" + string(salt) + "\x00" + strconv.Itoa(iters)
	saltedMu.Lock()
	defer saltedMu.Unlock()
	if k, ok := saltedCache[key]; ok {
		return k
	}
	k, _ := pbkdf2.Key(sha256.New, password, salt, iters, 32)
	saltedCache[key] = k
	return k
}

// startupRaw logs in over conn with pgproto3's Frontend, as libpq does
// (SCRAM with an empty user name in client-first), and returns the
// frontend after ReadyForQuery.
func startupRaw(t testing.TB, conn net.Conn, user, password string) *pgproto3.Frontend {
	t.Helper()
	fe, err := loginRaw(conn, user, password)
	if err != nil {
		t.Fatalf("raw login: %v", err)
	}
	return fe
}

func loginRaw(conn net.Conn, user, password string) (*pgproto3.Frontend, error) {
	conn.SetDeadline(time.Now().Add(10 * time.Second))
	defer conn.SetDeadline(time.Time{})
	fe := pgproto3.NewFrontend(conn, conn)
	fe.Send(&pgproto3.StartupMessage{ProtocolVersion: pgproto3.ProtocolVersion30,
		Parameters: map[string]string{"user": user, "database": "sidetrend"}})
	if err := fe.Flush(); err != nil {
		return nil, err
	}
	const clientNonce = "fyko+d2lbbFgONRv9qkxdawL" // any printable nonce
	var clientFirstBare, serverFirst, serverSig string
	for {
		msg, err := fe.Receive()
		if err != nil {
			return nil, err
		}
		switch m := msg.(type) {
		case *pgproto3.AuthenticationSASL:
			clientFirstBare = "n=,r=" + clientNonce
			fe.Send(&pgproto3.SASLInitialResponse{AuthMechanism: "SCRAM-SHA-256", Data: []byte("n,," + clientFirstBare)})
		case *pgproto3.AuthenticationSASLContinue:
			serverFirst = string(m.Data)
			var nonce, salt string
			iters := 0
			for _, a := range strings.Split(serverFirst, ",") {
				switch {
				case strings.HasPrefix(a, "r="):
					nonce = a[2:]
				case strings.HasPrefix(a, "s="):
					salt = a[2:]
				case strings.HasPrefix(a, "i="):
					iters, _ = strconv.Atoi(a[2:])
				}
			}
			saltBytes, _ := base64.StdEncoding.DecodeString(salt)
			withoutProof := "c=biws,r=" + nonce
			proof, sig := scramClientProof(password, saltBytes, iters, clientFirstBare+","+serverFirst+","+withoutProof)
			serverSig = "v=" + base64.StdEncoding.EncodeToString(sig)
			fe.Send(&pgproto3.SASLResponse{Data: []byte(withoutProof + ",p=" + base64.StdEncoding.EncodeToString(proof))})
		case *pgproto3.AuthenticationSASLFinal:
			if string(m.Data) != serverSig {
				return nil, fmt.Errorf("server signature %q, want %q", m.Data, serverSig)
			}
		case *pgproto3.ErrorResponse:
			return nil, fmt.Errorf("%s %s", m.Code, m.Message)
		case *pgproto3.ReadyForQuery:
			return fe, nil
		}
		if err := fe.Flush(); err != nil {
			return nil, err
		}
	}
}
