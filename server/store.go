package server

import (
	"bufio"
	"bytes"
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"
)

// Data directory layout (DESIGN.md):
//
//	DATA/sessions/<id>/session.json  parameters, source, tokens
//	DATA/sessions/<id>/frames/       uploads as received
//	DATA/sessions/<id>/alarms.jsonl  one line per alarm event, fsync'd
//	DATA/sessions/<id>/stats.csv     frame,g,limit,pixels_read
const (
	sessionFileName = "session.json"
	framesDirName   = "frames"
	alarmsFileName  = "alarms.jsonl"
	statsFileName   = "stats.csv"
	statsHeader     = "frame,g,limit,pixels_read\n"
)

// Source says where a session's frames come from.
type Source struct {
	Kind     string   `json:"kind"`               // "upload" or "demo"
	Files    []string `json:"files,omitempty"`    // upload: file names in frames/, as received
	Scenario string   `json:"scenario,omitempty"` // demo: samples scenario name
}

// meta is session.json.
type meta struct {
	ID         string    `json:"id"`
	Name       string    `json:"name"`
	Created    time.Time `json:"created"`
	OwnerToken string    `json:"owner_token"`
	ShareToken string    `json:"share_token"`
	Params     Params    `json:"params"`
	Source     Source    `json:"source"`
	// Run counts parameter changes; earlier runs' logs move to runs/<n>/.
	Run int `json:"run"`
}

// newToken returns 128 bits from crypto/rand, hex encoded.
func newToken() (string, error) {
	var b [16]byte
	if _, err := rand.Read(b[:]); err != nil {
		return "", fmt.Errorf("server: token: %w", err)
	}
	return hex.EncodeToString(b[:]), nil
}

// newID returns a short random session id (64 bits; ids are not secrets).
func newID() (string, error) {
	var b [8]byte
	if _, err := rand.Read(b[:]); err != nil {
		return "", fmt.Errorf("server: session id: %w", err)
	}
	return hex.EncodeToString(b[:]), nil
}

// validID reports whether s looks like one of our ids (so it is safe in a path).
func validID(s string) bool {
	if len(s) != 16 {
		return false
	}
	_, err := hex.DecodeString(s)
	return err == nil
}

// writeFileSync writes data to path atomically: a temporary file, fsync,
// rename, fsync of the directory.
func writeFileSync(path string, data []byte) error {
	dir := filepath.Dir(path)
	f, err := os.CreateTemp(dir, ".tmp-*")
	if err != nil {
		return fmt.Errorf("server: write %s: %w", path, err)
	}
	tmp := f.Name()
	_, err = f.Write(data)
	if err == nil {
		err = f.Sync()
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(tmp, path)
	}
	if err != nil {
		os.Remove(tmp)
		return fmt.Errorf("server: write %s: %w", path, err)
	}
	syncDir(dir)
	return nil
}

func syncDir(dir string) {
	if d, err := os.Open(dir); err == nil {
		d.Sync()
		d.Close()
	}
}

func saveMeta(dir string, m meta) error {
	data, err := json.MarshalIndent(m, "", "  ")
	if err != nil {
		return fmt.Errorf("server: encode session %s: %w", m.ID, err)
	}
	return writeFileSync(filepath.Join(dir, sessionFileName), append(data, '\n'))
}

func loadMeta(dir string) (meta, error) {
	var m meta
	data, err := os.ReadFile(filepath.Join(dir, sessionFileName))
	if err != nil {
		return m, fmt.Errorf("server: read session: %w", err)
	}
	if err := json.Unmarshal(data, &m); err != nil {
		return m, fmt.Errorf("server: %s: %w", filepath.Join(dir, sessionFileName), err)
	}
	return m, nil
}

// alarmEvent is one line of alarms.jsonl: an episode started or ended.
type alarmEvent struct {
	Event string      `json:"event"` // "start" or "end"
	Alarm reportAlarm `json:"alarm"`
}

// alarmLog appends alarm events, fsync'ing each so an accepted alarm
// survives a crash.
type alarmLog struct{ f *os.File }

func openAlarmLog(dir string) (*alarmLog, error) {
	f, err := os.OpenFile(filepath.Join(dir, alarmsFileName), os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o644)
	if err != nil {
		return nil, fmt.Errorf("server: alarm log: %w", err)
	}
	return &alarmLog{f: f}, nil
}

func (l *alarmLog) append(ev alarmEvent) error {
	line, err := json.Marshal(ev)
	if err != nil {
		return fmt.Errorf("server: encode alarm: %w", err)
	}
	if _, err := l.f.Write(append(line, '\n')); err != nil {
		return fmt.Errorf("server: alarm log: %w", err)
	}
	if err := l.f.Sync(); err != nil {
		return fmt.Errorf("server: alarm log sync: %w", err)
	}
	return nil
}

func (l *alarmLog) close() error { return l.f.Close() }

// readAlarmEvents reads alarms.jsonl; a torn last line (crash mid-write,
// before its fsync returned) is dropped and truncated away.
func readAlarmEvents(dir string) ([]alarmEvent, error) {
	path := filepath.Join(dir, alarmsFileName)
	data, err := os.ReadFile(path)
	if os.IsNotExist(err) {
		return nil, nil
	}
	if err != nil {
		return nil, fmt.Errorf("server: read alarms: %w", err)
	}
	var evs []alarmEvent
	good := 0
	for off := 0; off < len(data); {
		nl := bytes.IndexByte(data[off:], '\n')
		if nl < 0 {
			break
		}
		var ev alarmEvent
		if err := json.Unmarshal(data[off:off+nl], &ev); err != nil {
			break
		}
		evs = append(evs, ev)
		off += nl + 1
		good = off
	}
	if good < len(data) {
		if err := os.Truncate(path, int64(good)); err != nil {
			return nil, fmt.Errorf("server: repair alarms: %w", err)
		}
	}
	return evs, nil
}

// statsRow is one line of stats.csv.
type statsRow struct {
	Frame      int
	G, Limit   float64
	PixelsRead int
}

// statsLog appends one CSV line per frame. Lines are written whole (one
// write each) but not fsync'd: losing the tail only means a resume replays
// a few more frames.
type statsLog struct {
	f   *os.File
	buf []byte
}

func openStatsLog(dir string) (*statsLog, error) {
	path := filepath.Join(dir, statsFileName)
	f, err := os.OpenFile(path, os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o644)
	if err != nil {
		return nil, fmt.Errorf("server: stats: %w", err)
	}
	if st, err := f.Stat(); err == nil && st.Size() == 0 {
		if _, err := f.WriteString(statsHeader); err != nil {
			f.Close()
			return nil, fmt.Errorf("server: stats: %w", err)
		}
	}
	return &statsLog{f: f}, nil
}

func (l *statsLog) append(r statsRow) error {
	b := l.buf[:0]
	b = strconv.AppendInt(b, int64(r.Frame), 10)
	b = append(b, ',')
	b = strconv.AppendFloat(b, r.G, 'g', 8, 64)
	b = append(b, ',')
	b = strconv.AppendFloat(b, r.Limit, 'g', 8, 64)
	b = append(b, ',')
	b = strconv.AppendInt(b, int64(r.PixelsRead), 10)
	b = append(b, '\n')
	l.buf = b
	if _, err := l.f.Write(b); err != nil {
		return fmt.Errorf("server: stats: %w", err)
	}
	return nil
}

func (l *statsLog) close() error { return l.f.Close() }

// readStats returns the complete rows of stats.csv and truncates a torn
// last line so appending can continue cleanly.
func readStats(dir string) ([]statsRow, error) {
	path := filepath.Join(dir, statsFileName)
	f, err := os.Open(path)
	if os.IsNotExist(err) {
		return nil, nil
	}
	if err != nil {
		return nil, fmt.Errorf("server: read stats: %w", err)
	}
	defer f.Close()
	var rows []statsRow
	br := bufio.NewReader(f)
	good := int64(0)
	for {
		line, err := br.ReadString('\n')
		if err == io.EOF || (err == nil && !strings.HasSuffix(line, "\n")) {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("server: read stats: %w", err)
		}
		if good == 0 && line == statsHeader {
			good += int64(len(line))
			continue
		}
		r, ok := parseStatsLine(strings.TrimSuffix(line, "\n"))
		if !ok {
			break
		}
		rows = append(rows, r)
		good += int64(len(line))
	}
	if st, err := f.Stat(); err == nil && st.Size() > good && good > 0 {
		if err := os.Truncate(path, good); err != nil {
			return nil, fmt.Errorf("server: repair stats: %w", err)
		}
	}
	return rows, nil
}

func parseStatsLine(s string) (statsRow, bool) {
	p := strings.Split(s, ",")
	if len(p) != 4 {
		return statsRow{}, false
	}
	var r statsRow
	var e1, e2, e3, e4 error
	r.Frame, e1 = strconv.Atoi(p[0])
	r.G, e2 = strconv.ParseFloat(p[1], 64)
	r.Limit, e3 = strconv.ParseFloat(p[2], 64)
	r.PixelsRead, e4 = strconv.Atoi(p[3])
	return r, e1 == nil && e2 == nil && e3 == nil && e4 == nil
}

// archiveRun moves the current run's logs into runs/<n>/ before a new run
// starts with changed parameters, so nothing logged is lost.
func archiveRun(dir string, run int) error {
	dst := filepath.Join(dir, "runs", strconv.Itoa(run))
	if err := os.MkdirAll(dst, 0o755); err != nil {
		return fmt.Errorf("server: archive run: %w", err)
	}
	for _, name := range []string{alarmsFileName, statsFileName} {
		err := os.Rename(filepath.Join(dir, name), filepath.Join(dst, name))
		if err != nil && !os.IsNotExist(err) {
			return fmt.Errorf("server: archive run: %w", err)
		}
	}
	syncDir(dir)
	return nil
}
