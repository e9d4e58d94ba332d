package sqlwire

import (
	"encoding/base64"
	"testing"
)

// TestSCRAMVector runs the server side on the SCRAM-SHA-256 example of
// RFC 7677 section 3 (user "user", password "pencil").
func TestSCRAMVector(t *testing.T) {
	salt, _ := base64.StdEncoding.DecodeString("W22ZaJ0SNY7soEsUEjb6gQ==")
	sec, err := newScramSecret("pencil", salt, 4096)
	if err != nil {
		t.Fatal(err)
	}
	x := &scramExchange{secret: sec}
	if err := x.clientFirst("n,,n=user,r=rOprNGfwEbeRWgbNEkqO", "%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0"); err != nil {
		t.Fatal(err)
	}
	if want := "r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0,s=W22ZaJ0SNY7soEsUEjb6gQ==,i=4096"; x.serverFirst != want {
		t.Fatalf("server-first %q, want %q", x.serverFirst, want)
	}
	final, ok, err := x.clientFinal("c=biws,r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0,p=dHzbZapWIk4jUhN+Ute9ytag9zjfMHgsqmmiz7AndVQ=")
	if err != nil || !ok {
		t.Fatalf("proof refused: %v", err)
	}
	if want := "v=6rriTRBi23WpRR/wtup+mMhUZUn/dB5nLTJRsjl95G4="; final != want {
		t.Fatalf("server-final %q, want %q", final, want)
	}

	// One flipped bit in the proof is a wrong password.
	x = &scramExchange{secret: sec}
	x.clientFirst("n,,n=user,r=rOprNGfwEbeRWgbNEkqO", "%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0")
	if _, ok, err := x.clientFinal("c=biws,r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0,p=eHzbZapWIk4jUhN+Ute9ytag9zjfMHgsqmmiz7AndVQ="); ok || err != nil {
		t.Fatalf("altered proof: ok %v err %v", ok, err)
	}
	// Malformed or mismatched messages are errors, not wrong passwords.
	for _, first := range []string{"", "p=tls-server-end-point,,n=,r=x", "n,a=admin,n=,r=x", "n,,r=x", "n,,n=,r="} {
		if err := (&scramExchange{secret: sec}).clientFirst(first, "s"); err == nil {
			t.Errorf("client-first %q accepted", first)
		}
	}
	x = &scramExchange{secret: sec}
	x.clientFirst("n,,n=,r=abc", "def")
	for _, final := range []string{"c=biws,r=abcdef", "c=eSws,r=abcdef,p=AAAA", "c=biws,r=abc,p=AAAA", "c=biws,r=abcdef,p=!!"} {
		if _, ok, err := x.clientFinal(final); err == nil || ok {
			t.Errorf("client-final %q: ok %v err %v", final, ok, err)
		}
	}
}
