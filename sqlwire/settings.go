package sqlwire

import (
	"sort"
	"strconv"
	"strings"
	"time"
)

// ServerVersion is what the endpoint reports as server_version. libpq
// parses it into PQserverVersion 150000, so postgres_fdw treats the
// endpoint as Postgres 15 (CLOSE and DECLARE again on rescan, no MOVE).
const ServerVersion = "15.0 (sidetrend)"

// setting is one configuration parameter a session knows.
type setting struct {
	name     string // as SHOW and ParameterStatus spell it
	def      string
	reported bool // sent in ParameterStatus when it changes
	readOnly bool
	// check validates and normalises a new value; nil accepts anything.
	check func(v string) (string, error)
}

var settingList = []setting{
	{name: "application_name", reported: true},
	{name: "client_encoding", def: "UTF8", reported: true, check: checkEncoding},
	{name: "DateStyle", def: "ISO, MDY", reported: true, check: checkDateStyle},
	{name: "IntervalStyle", def: "postgres", reported: true, check: checkOneOf("postgres")},
	{name: "TimeZone", def: "UTC", reported: true, check: checkTimeZone},
	{name: "extra_float_digits", def: "1", check: checkIntRange(-15, 3)},
	{name: "search_path", def: `"$user", public`},
	{name: "statement_timeout", def: "0", check: checkDuration},
	{name: "lock_timeout", def: "0", check: checkDuration},
	{name: "idle_in_transaction_session_timeout", def: "0", check: checkDuration},
	{name: "idle_session_timeout", def: "0", check: checkDuration},
	{name: "client_min_messages", def: "notice", check: checkOneOf("debug5", "debug4", "debug3", "debug2", "debug1", "debug", "log", "notice", "warning", "error")},
	{name: "standard_conforming_strings", def: "on", reported: true, check: checkOneOf("on")},
	{name: "transaction_isolation", def: "read committed", check: checkIsolation},
	{name: "default_transaction_isolation", def: "read committed", check: checkIsolation},
	{name: "transaction_read_only", def: "on", check: checkBool},
	{name: "default_transaction_read_only", def: "on", reported: true, check: checkOneOf("on")},
	{name: "transaction_deferrable", def: "off", check: checkBool},
	{name: "default_transaction_deferrable", def: "off", check: checkBool},
	{name: "bytea_output", def: "hex", check: checkOneOf("hex")},
	{name: "server_version", def: ServerVersion, reported: true, readOnly: true},
	{name: "server_version_num", def: "150000", readOnly: true},
	{name: "server_encoding", def: "UTF8", reported: true, readOnly: true},
	{name: "integer_datetimes", def: "on", reported: true, readOnly: true},
	{name: "in_hot_standby", def: "off", reported: true, readOnly: true},
	{name: "max_identifier_length", def: "63", readOnly: true},
	{name: "is_superuser", def: "off", reported: true, readOnly: true},
	{name: "session_authorization", reported: true, readOnly: true},
}

var settingsByName = func() map[string]*setting {
	m := map[string]*setting{}
	for i := range settingList {
		m[strings.ToLower(settingList[i].name)] = &settingList[i]
	}
	return m
}()

// settings are a session's parameter values: session-level ones and the
// SET LOCAL overrides of the current transaction.
type settings struct {
	session map[string]string
	local   map[string]string
}

func newSettings(user string) *settings {
	s := &settings{session: map[string]string{}, local: map[string]string{}}
	for _, st := range settingList {
		s.session[strings.ToLower(st.name)] = st.def
	}
	s.session["session_authorization"] = user
	return s
}

func (s *settings) get(name string) string {
	if v, ok := s.local[name]; ok {
		return v
	}
	return s.session[name]
}

func (s *settings) clone() *settings {
	c := &settings{session: make(map[string]string, len(s.session)), local: make(map[string]string, len(s.local))}
	for k, v := range s.session {
		c.session[k] = v
	}
	for k, v := range s.local {
		c.local[k] = v
	}
	return c
}

// set validates and applies one SET; name is lower-case.
func (s *settings) set(name, value string, local bool) error {
	st, ok := settingsByName[name]
	custom := !ok && strings.Contains(name, ".")
	if !ok && !custom {
		return errorf(codeUndefinedObject, "unrecognized configuration parameter %q", name).
			WithHint("the endpoint knows %s", knownSettings())
	}
	if ok && st.readOnly {
		return errorf("55P02", "parameter %q cannot be changed", st.name)
	}
	if ok && st.check != nil {
		v, err := st.check(value)
		if err != nil {
			return err
		}
		value = v
	}
	if local {
		s.local[name] = value
	} else {
		s.session[name] = value
		delete(s.local, name)
	}
	return nil
}

func (s *settings) reset(name string) error {
	st, ok := settingsByName[name]
	if !ok {
		if strings.Contains(name, ".") {
			delete(s.session, name)
			delete(s.local, name)
			return nil
		}
		return errorf(codeUndefinedObject, "unrecognized configuration parameter %q", name)
	}
	if st.readOnly {
		return errorf("55P02", "parameter %q cannot be changed", st.name)
	}
	s.session[name] = st.def
	delete(s.local, name)
	return nil
}

func (s *settings) resetAll() {
	for _, st := range settingList {
		if !st.readOnly {
			n := strings.ToLower(st.name)
			s.session[n] = st.def
			delete(s.local, n)
		}
	}
}

func knownSettings() string {
	var names []string
	for _, st := range settingList {
		if !st.readOnly {
			names = append(names, st.name)
		}
	}
	sort.Strings(names)
	return strings.Join(names, ", ")
}

// statementTimeout is statement_timeout, 0 for none.
func (s *settings) statementTimeout() time.Duration {
	d, _ := parseDuration(s.get("statement_timeout"))
	return d
}

func checkOneOf(allowed ...string) func(string) (string, error) {
	return func(v string) (string, error) {
		l := strings.ToLower(strings.TrimSpace(v))
		for _, a := range allowed {
			if l == a {
				return a, nil
			}
		}
		return "", errorf(codeInvalidParameter, "invalid value %q: the endpoint accepts %s", v, strings.Join(allowed, ", "))
	}
}

func checkBool(v string) (string, error) {
	switch strings.ToLower(strings.TrimSpace(v)) {
	case "on", "true", "yes", "1", "t", "y":
		return "on", nil
	case "off", "false", "no", "0", "f", "n":
		return "off", nil
	}
	return "", errorf(codeInvalidParameter, "parameter requires a Boolean value, not %q", v)
}

func checkIntRange(lo, hi int) func(string) (string, error) {
	return func(v string) (string, error) {
		n, err := strconv.Atoi(strings.TrimSpace(v))
		if err != nil || n < lo || n > hi {
			return "", errorf(codeInvalidParameter, "%q is outside the valid range: use a whole number from %d to %d", v, lo, hi)
		}
		return strconv.Itoa(n), nil
	}
}

func checkIsolation(v string) (string, error) {
	return checkOneOf("serializable", "repeatable read", "read committed", "read uncommitted")(v)
}

func checkEncoding(v string) (string, error) {
	n := strings.ToUpper(strings.NewReplacer("-", "", "_", "").Replace(strings.TrimSpace(v)))
	switch n {
	case "UTF8", "UNICODE":
		return "UTF8", nil
	case "SQLASCII":
		return "SQL_ASCII", nil
	}
	return "", notSupported("client_encoding %q is not supported: the endpoint speaks UTF8", v).
		WithHint("create the local database with ENCODING 'UTF8', or set client_encoding to UTF8")
}

func checkDateStyle(v string) (string, error) {
	order := "MDY"
	for _, part := range strings.Split(v, ",") {
		switch p := strings.ToUpper(strings.TrimSpace(part)); p {
		case "ISO", "DEFAULT":
		case "MDY", "DMY", "YMD":
			order = p
		case "US", "NONEURO", "NONEUROPEAN":
			order = "MDY"
		case "EURO", "EUROPEAN":
			order = "DMY"
		default:
			return "", notSupported("DateStyle %q is not supported: the endpoint writes ISO dates", v).
				WithHint("use SET datestyle = ISO")
		}
	}
	return "ISO, " + order, nil
}

func checkTimeZone(v string) (string, error) {
	if _, err := loadZone(v); err != nil {
		return "", errorf(codeInvalidParameter, "invalid value for parameter \"TimeZone\": %q", v).
			WithHint("use a zone name such as 'UTC' or 'Europe/Berlin'")
	}
	return strings.TrimSpace(v), nil
}

// loadZone resolves a TimeZone setting: UTC and GMT, or an IANA zone name.
func loadZone(v string) (*time.Location, error) {
	v = strings.TrimSpace(v)
	switch strings.ToUpper(v) {
	case "UTC", "GMT", "Z", "ZULU", "UCT", "UNIVERSAL", "ETC/UTC", "ETC/GMT":
		return time.UTC, nil
	}
	if v == "" || strings.ContainsAny(v, " .") {
		return nil, errorf(codeInvalidParameter, "invalid time zone %q", v)
	}
	return time.LoadLocation(v)
}

func checkDuration(v string) (string, error) {
	if _, err := parseDuration(v); err != nil {
		return "", err
	}
	return strings.TrimSpace(v), nil
}

// parseDuration reads a time setting as Postgres does: a bare number is
// milliseconds; units us, ms, s, min, h, d are accepted.
func parseDuration(v string) (time.Duration, error) {
	s := strings.TrimSpace(v)
	i := 0
	for i < len(s) && (s[i] >= '0' && s[i] <= '9' || s[i] == '.') {
		i++
	}
	num, unit := s[:i], strings.TrimSpace(s[i:])
	f, err := strconv.ParseFloat(num, 64)
	if err != nil || f < 0 {
		return 0, errorf(codeInvalidParameter, "invalid value %q for a time setting: use milliseconds, or a number with a unit such as '200ms' or '5s'", v)
	}
	scale := map[string]time.Duration{"": time.Millisecond, "us": time.Microsecond, "ms": time.Millisecond,
		"s": time.Second, "min": time.Minute, "h": time.Hour, "d": 24 * time.Hour}
	u, ok := scale[unit]
	if !ok {
		return 0, errorf(codeInvalidParameter, "invalid unit %q in %q: use us, ms, s, min, h or d", unit, v)
	}
	return time.Duration(f * float64(u)), nil
}
