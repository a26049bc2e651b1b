package feedback

import (
	"context"
	"database/sql"
	"embed"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"slices"
	"sort"
	"strings"
	"sync"
	"time"

	_ "github.com/jackc/pgx/v5/stdlib" // PostgreSQL through pgx, registered as "pgx"
	_ "modernc.org/sqlite"             // pure-Go SQLite driver, registered as "sqlite"
)

//go:embed migrations/sqlite/*.sql migrations/postgres/*.sql
var migrations embed.FS

// tsFormat stores times in UTC with a fixed width, so text order is time
// order.
const tsFormat = "2006-01-02T15:04:05.000000000Z"

// DB is the store on SQL: SQLite for one node (a file in WAL mode) or
// PostgreSQL for several replicas. One goroutine commits concurrent calls'
// records together (group commit), each record in its own savepoint so one
// failure does not undo the others.
type DB struct {
	db      *sql.DB
	dialect dialect
	jobs    chan job
	done    chan struct{}
	// mu guards closed: senders hold it shared while queueing, Close
	// exclusively while closing the queue.
	mu     sync.RWMutex
	closed bool
}

// ErrClosed is returned for a record offered after Close.
var ErrClosed = errors.New("store is closed")

type job struct {
	ctx  context.Context
	run  func(*sql.Tx) error
	errc chan error
}

// dialect is what differs between the back ends.
type dialect struct {
	name string // migrations directory
	// bind rewrites "?" placeholders for the driver.
	bind         func(string) string
	insertIgnore string // "INSERT OR IGNORE INTO" or "INSERT INTO"
	onConflict   string // "" or " ON CONFLICT DO NOTHING"
}

var (
	sqliteDialect   = dialect{name: "sqlite", bind: func(q string) string { return q }, insertIgnore: "INSERT OR IGNORE INTO"}
	postgresDialect = dialect{name: "postgres", bind: dollarPlaceholders, insertIgnore: "INSERT INTO", onConflict: " ON CONFLICT DO NOTHING"}
)

// dollarPlaceholders turns ? into $1, $2, … (no ? appears in halite's SQL
// otherwise).
func dollarPlaceholders(q string) string {
	var b strings.Builder
	n := 0
	for _, r := range q {
		if r == '?' {
			n++
			fmt.Fprintf(&b, "$%d", n)
			continue
		}
		b.WriteRune(r)
	}
	return b.String()
}

// Options tune the group commit.
type Options struct {
	MaxBatch int           // records per transaction at most (default 256)
	MaxWait  time.Duration // how long a batch waits for company (default 2 ms)
}

// OpenSQLite opens (creating if needed) the database at path, applies the
// embedded migrations and starts the writer.
func OpenSQLite(path string, opt Options) (*DB, error) {
	dsn := "file:" + path + "?_pragma=journal_mode(WAL)&_pragma=synchronous(FULL)&_pragma=foreign_keys(1)&_pragma=busy_timeout(5000)"
	db, err := sql.Open("sqlite", dsn)
	if err != nil {
		return nil, fmt.Errorf("open store %s: %w", path, err)
	}
	return start(db, sqliteDialect, opt, path)
}

// OpenPostgres connects to PostgreSQL at dsn (a postgres:// URL) through a
// pooled pgx connection, applies the embedded migrations and starts the
// writer.
func OpenPostgres(dsn string, opt Options) (*DB, error) {
	db, err := sql.Open("pgx", dsn)
	if err != nil {
		return nil, fmt.Errorf("open store: %w", err)
	}
	db.SetMaxOpenConns(8)
	return start(db, postgresDialect, opt, "postgres")
}

func start(db *sql.DB, d dialect, opt Options, name string) (*DB, error) {
	if opt.MaxBatch <= 0 {
		opt.MaxBatch = 256
	}
	if opt.MaxWait <= 0 {
		opt.MaxWait = 2 * time.Millisecond
	}
	if err := migrate(db, d); err != nil {
		db.Close()
		return nil, fmt.Errorf("open store %s: %w", name, err)
	}
	s := &DB{db: db, dialect: d, jobs: make(chan job), done: make(chan struct{})}
	go s.writer(opt)
	return s, nil
}

func migrate(db *sql.DB, d dialect) error {
	if _, err := db.Exec(`CREATE TABLE IF NOT EXISTS schema_migrations (version TEXT PRIMARY KEY, applied_at TEXT NOT NULL)`); err != nil {
		return fmt.Errorf("migrate: %w", err)
	}
	names, err := fs.Glob(migrations, "migrations/"+d.name+"/*.sql")
	if err != nil {
		return fmt.Errorf("migrate: %w", err)
	}
	sort.Strings(names)
	for _, name := range names {
		version := strings.TrimSuffix(name[strings.LastIndex(name, "/")+1:], ".sql")
		var n int
		if err := db.QueryRow(d.bind(`SELECT count(*) FROM schema_migrations WHERE version = ?`), version).Scan(&n); err != nil {
			return fmt.Errorf("migrate %s: %w", version, err)
		}
		if n > 0 {
			continue
		}
		ddl, err := migrations.ReadFile(name)
		if err != nil {
			return fmt.Errorf("migrate %s: %w", version, err)
		}
		tx, err := db.Begin()
		if err != nil {
			return fmt.Errorf("migrate %s: %w", version, err)
		}
		if _, err := tx.Exec(string(ddl)); err != nil {
			tx.Rollback()
			return fmt.Errorf("migrate %s: %w", version, err)
		}
		if _, err := tx.Exec(d.bind(`INSERT INTO schema_migrations VALUES (?, ?)`), version, time.Now().UTC().Format(time.RFC3339)); err != nil {
			tx.Rollback()
			return fmt.Errorf("migrate %s: %w", version, err)
		}
		if err := tx.Commit(); err != nil {
			return fmt.Errorf("migrate %s: %w", version, err)
		}
	}
	return nil
}

// writer runs batches until Close.
func (s *DB) writer(opt Options) {
	defer close(s.done)
	for first := range s.jobs {
		batch := []job{first}
		timer := time.NewTimer(opt.MaxWait)
	collect:
		for len(batch) < opt.MaxBatch {
			select {
			case j, ok := <-s.jobs:
				if !ok {
					break collect
				}
				batch = append(batch, j)
			case <-timer.C:
				break collect
			}
		}
		timer.Stop()
		s.commit(batch)
	}
}

// commit runs a batch in one transaction, each job in a savepoint.
func (s *DB) commit(batch []job) {
	errs := make([]error, len(batch))
	tx, err := s.db.Begin()
	if err == nil {
		for i, j := range batch {
			if err := j.ctx.Err(); err != nil {
				errs[i] = err
				continue
			}
			if _, err := tx.Exec(`SAVEPOINT job`); err != nil {
				errs[i] = err
				continue
			}
			if errs[i] = j.run(tx); errs[i] != nil {
				tx.Exec(`ROLLBACK TO SAVEPOINT job`)
			}
			tx.Exec(`RELEASE SAVEPOINT job`)
		}
		err = tx.Commit()
	}
	for i, j := range batch {
		if err != nil {
			errs[i] = fmt.Errorf("store commit: %w", err)
		}
		j.errc <- errs[i]
	}
}

// do queues run for the writer and waits for its commit.
func (s *DB) do(ctx context.Context, run func(*sql.Tx) error) error {
	j := job{ctx: ctx, run: run, errc: make(chan error, 1)}
	s.mu.RLock()
	if s.closed {
		s.mu.RUnlock()
		return ErrClosed
	}
	select {
	case s.jobs <- j:
	case <-ctx.Done():
		s.mu.RUnlock()
		return ctx.Err()
	}
	s.mu.RUnlock()
	return <-j.errc // the commit is waited for even if ctx ends: the record may be durable
}

// LogCards implements Store.
func (s *DB) LogCards(ctx context.Context, cards []CardRecord) error {
	if len(cards) == 0 {
		return nil
	}
	return s.do(ctx, func(tx *sql.Tx) error {
		for _, c := range cards {
			fig, err := json.Marshal(c.Figures)
			if err != nil {
				return fmt.Errorf("log card %s: %w", c.UUID, err)
			}
			sugg, _ := json.Marshal(nonNil(c.Suggestions))
			if _, err := tx.Exec(s.dialect.bind(`INSERT INTO card_log (card_uuid, service, rule, indicator, ruleset, tenant, patient_hash, created_at, figures, suggestions)
				VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)`), c.UUID, c.Service, c.Rule, c.Indicator, c.Ruleset, c.Tenant, c.PatientHash,
				c.At.UTC().Format(tsFormat), string(fig), string(sugg)); err != nil {
				return fmt.Errorf("log card %s: %w", c.UUID, err)
			}
		}
		return nil
	})
}

func nonNil(s []string) []string {
	if s == nil {
		return []string{}
	}
	return s
}

// RecordFeedback implements Store.
func (s *DB) RecordFeedback(ctx context.Context, f FeedbackRecord) error {
	return s.do(ctx, func(tx *sql.Tx) error {
		var raw string
		err := tx.QueryRow(s.dialect.bind(`SELECT suggestions FROM card_log WHERE card_uuid = ? AND service = ?`), f.Card, f.Service).Scan(&raw)
		if errors.Is(err, sql.ErrNoRows) {
			return ErrUnknownCard
		}
		if err != nil {
			return fmt.Errorf("record feedback: %w", err)
		}
		var known []string
		if err := json.Unmarshal([]byte(raw), &known); err != nil {
			return fmt.Errorf("record feedback: %w", err)
		}
		for _, a := range f.AcceptedSuggestions {
			if !slices.Contains(known, a) {
				return ErrUnknownSuggestion
			}
		}
		acc, _ := json.Marshal(nonNil(f.AcceptedSuggestions))
		_, err = tx.Exec(s.dialect.bind(s.dialect.insertIgnore+` feedback (card_uuid, outcome, outcome_at, accepted, reason_system, reason_code, user_comment, received_at)
			VALUES (?, ?, ?, ?, ?, ?, ?, ?)`+s.dialect.onConflict), f.Card, f.Outcome, f.OutcomeAt.UTC().Format(tsFormat), string(acc),
			f.ReasonSystem, f.ReasonCode, f.UserComment, time.Now().UTC().Format(tsFormat))
		if err != nil {
			return fmt.Errorf("record feedback: %w", err)
		}
		return nil
	})
}

// Purge implements Store.
func (s *DB) Purge(ctx context.Context, before time.Time) (int64, error) {
	var n int64
	err := s.do(ctx, func(tx *sql.Tx) error {
		res, err := tx.Exec(s.dialect.bind(`DELETE FROM card_log WHERE created_at < ?`), before.UTC().Format(tsFormat))
		if err != nil {
			return fmt.Errorf("purge: %w", err)
		}
		n, err = res.RowsAffected()
		return err
	})
	return n, err
}

// Counts implements Store.
func (s *DB) Counts(ctx context.Context) (cards, feedback int64, err error) {
	if err := s.db.QueryRowContext(ctx, `SELECT (SELECT count(*) FROM card_log), (SELECT count(*) FROM feedback)`).Scan(&cards, &feedback); err != nil {
		return 0, 0, fmt.Errorf("counts: %w", err)
	}
	return cards, feedback, nil
}

// Close stops the writer after the queued records are committed.
func (s *DB) Close() error {
	s.mu.Lock()
	if s.closed {
		s.mu.Unlock()
		return nil
	}
	s.closed = true
	close(s.jobs)
	s.mu.Unlock()
	<-s.done
	return s.db.Close()
}

// HasCard reports whether the card log holds card uuid (for tests and
// audits).
func (s *DB) HasCard(ctx context.Context, uuid string) bool {
	var n int
	return s.db.QueryRowContext(ctx, s.dialect.bind(`SELECT count(*) FROM card_log WHERE card_uuid = ?`), uuid).Scan(&n) == nil && n > 0
}

// HasFeedback reports whether any feedback is held for card uuid.
func (s *DB) HasFeedback(ctx context.Context, uuid string) bool {
	var n int
	return s.db.QueryRowContext(ctx, s.dialect.bind(`SELECT count(*) FROM feedback WHERE card_uuid = ?`), uuid).Scan(&n) == nil && n > 0
}

// Remember implements the JWT replay cache on the store, so replicas
// sharing a PostgreSQL database share it: it reports whether jti of iss
// was seen and is still live, recording it until until if not.
func (s *DB) Remember(ctx context.Context, iss, jti string, until time.Time) (bool, error) {
	seen := false
	err := s.do(ctx, func(tx *sql.Tx) error {
		now := time.Now().UTC().Format(tsFormat)
		if _, err := tx.Exec(s.dialect.bind(`DELETE FROM jwt_replay WHERE iss = ? AND jti = ? AND until <= ?`), iss, jti, now); err != nil {
			return fmt.Errorf("replay cache: %w", err)
		}
		res, err := tx.Exec(s.dialect.bind(s.dialect.insertIgnore+` jwt_replay (iss, jti, until) VALUES (?, ?, ?)`+s.dialect.onConflict),
			iss, jti, until.UTC().Format(tsFormat))
		if err != nil {
			return fmt.Errorf("replay cache: %w", err)
		}
		n, err := res.RowsAffected()
		seen = n == 0
		return err
	})
	return seen, err
}
