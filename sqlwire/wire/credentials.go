package wire

import (
	"fmt"
	"os"
	"strings"
)

// PasswordEnv is the environment variable that holds the password of user
// DefaultUser when no credentials file is given.
const PasswordEnv = "SIDETREND_SQL_PASSWORD"

// DefaultUser is the endpoint user of PasswordEnv.
const DefaultUser = "sidetrend"

// ParseCredentials reads credentials as "user:password" lines. Blank lines
// and lines starting with # are skipped; the password is everything after
// the first colon, kept as written. The error names the line to fix.
func ParseCredentials(text string) (map[string]string, error) {
	out := map[string]string{}
	for i, line := range strings.Split(text, "\n") {
		line = strings.TrimRight(line, "\r")
		if strings.TrimSpace(line) == "" || strings.HasPrefix(strings.TrimSpace(line), "#") {
			continue
		}
		user, pw, ok := strings.Cut(line, ":")
		user = strings.TrimSpace(user)
		switch {
		case !ok:
			return nil, fmt.Errorf("credentials line %d has no colon: write user:password", i+1)
		case user == "":
			return nil, fmt.Errorf("credentials line %d has an empty user name: write user:password", i+1)
		case pw == "":
			return nil, fmt.Errorf("credentials line %d gives user %q an empty password: postgres_fdw needs a password for non-superusers", i+1, user)
		}
		if _, dup := out[user]; dup {
			return nil, fmt.Errorf("credentials line %d repeats user %q: give each user one line", i+1, user)
		}
		out[user] = pw
	}
	if len(out) == 0 {
		return nil, fmt.Errorf("no credentials: write at least one user:password line")
	}
	return out, nil
}

// LoadCredentials reads a credentials file (see ParseCredentials), or,
// when path is empty, takes the password of DefaultUser from PasswordEnv.
func LoadCredentials(path string) (map[string]string, error) {
	if path == "" {
		pw := os.Getenv(PasswordEnv)
		if pw == "" {
			return nil, fmt.Errorf("no endpoint credentials: set %s, or give a file of user:password lines", PasswordEnv)
		}
		return map[string]string{DefaultUser: pw}, nil
	}
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("read endpoint credentials: %w", err)
	}
	creds, err := ParseCredentials(string(b))
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return creds, nil
}
