package wire

import (
	"encoding/base64"
	"testing"

	"github.com/xdg-go/scram"
)

// scramServerWithNonce is the server side with a fixed server nonce.
func scramServerWithNonce(sec scram.StoredCredentials, nonce string) (*scram.ServerConversation, error) {
	srv, err := scram.SHA256.NewServer(func(string) (scram.StoredCredentials, error) { return sec, nil })
	if err != nil {
		return nil, err
	}
	return srv.WithNonceGenerator(func() string { return nonce }).NewConversation(), nil
}

// TestSCRAMVector runs the server side on the SCRAM-SHA-256 example of
// RFC 7677 section 3 (user "user", password "pencil"), with the RFC's
// server nonce.
func TestSCRAMVector(t *testing.T) {
	salt, _ := base64.StdEncoding.DecodeString("W22ZaJ0SNY7soEsUEjb6gQ==")
	sec, err := newScramSecret("pencil", salt, 4096)
	if err != nil {
		t.Fatal(err)
	}
	srv, err := scramServerWithNonce(sec, "%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0")
	if err != nil {
		t.Fatal(err)
	}
	first, err := srv.Step("n,,n=user,r=rOprNGfwEbeRWgbNEkqO")
	if want := "r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0,s=W22ZaJ0SNY7soEsUEjb6gQ==,i=4096"; err != nil || first != want {
		t.Fatalf("server-first %q (%v), want %q", first, err, want)
	}
	final, err := srv.Step("c=biws,r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0,p=dHzbZapWIk4jUhN+Ute9ytag9zjfMHgsqmmiz7AndVQ=")
	if want := "v=6rriTRBi23WpRR/wtup+mMhUZUn/dB5nLTJRsjl95G4="; err != nil || final != want || !srv.Valid() {
		t.Fatalf("server-final %q (%v, valid %v), want %q", final, err, srv.Valid(), want)
	}
	// One flipped bit in the proof is a wrong password.
	srv, _ = scramServerWithNonce(sec, "%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0")
	srv.Step("n,,n=user,r=rOprNGfwEbeRWgbNEkqO")
	if srv.Step("c=biws,r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0,p=eHzbZapWIk4jUhN+Ute9ytag9zjfMHgsqmmiz7AndVQ="); srv.Valid() {
		t.Fatal("altered proof accepted")
	}
}
