package wire

import (
	"strings"
	"testing"
)

func TestParseCredentials(t *testing.T) {
	got, err := ParseCredentials("# endpoint users\nsidetrend:crumb:with:colons\n\n  analyst : s p a c e \r\n")
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != 2 || got["sidetrend"] != "crumb:with:colons" || got["analyst"] != " s p a c e " {
		t.Fatalf("got %q", got)
	}
	for text, says := range map[string]string{
		"nocolon":       "line 1 has no colon",
		"\n:pw":         "line 2 has an empty user name",
		"a:":            "empty password",
		"a:x\na:y":      "repeats user",
		"# only a note": "no credentials",
	} {
		if _, err := ParseCredentials(text); err == nil || !strings.Contains(err.Error(), says) {
			t.Errorf("%q: %v, want %q", text, err, says)
		}
	}
	t.Setenv(PasswordEnv, "")
	if _, err := LoadCredentials(""); err == nil || !strings.Contains(err.Error(), PasswordEnv) {
		t.Errorf("no env: %v", err)
	}
	t.Setenv(PasswordEnv, "pw")
	if c, err := LoadCredentials(""); err != nil || c[DefaultUser] != "pw" {
		t.Errorf("env: %v %v", c, err)
	}
}
