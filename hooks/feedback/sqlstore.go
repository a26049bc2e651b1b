package feedback

import (
	"context"
	"database/sql"
	"database/sql/driver"
	"embed"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"log/slog"
	"net"
	"slices"
	"sort"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"time"

	"github.com/jackc/pgx/v5/pgconn"
	_ "github.com/jackc/pgx/v5/stdlib" // PostgreSQL through pgx, registered as "pgx"
	"modernc.org/sqlite"               // pure-Go SQLite driver, registered as "sqlite"
	sqlite3 "modernc.org/sqlite/lib"
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
//
// Records wait for the writer in a queue of Options.QueueSize: a record
// offered while it is full is refused at once with ErrQueueFull, so a
// stalled database sheds load instead of piling up calls. A caller waits
// for its commit until its ctx ends or two commit bounds pass, whichever
// is first, and then gets ErrStalled; the writer skips a record whose
// caller stopped waiting before its batch began, but one already in a
// batch may still commit.
type DB struct {
	db      *sql.DB
	dialect dialect
	opt     Options
	jobs    chan job
	done    chan struct{}
	// gate is held by the writer for each commit and by the SQLite
	// checkpointer for a WAL restart, so a restart never races the writer
	// for SQLite's write lock.
	gate sync.Mutex
	// stopCheckpoints ends the SQLite checkpointer; checkpointsDone is
	// closed when it has (both nil for PostgreSQL).
	stopCheckpoints chan struct{}
	checkpointsDone chan struct{}
	// mu guards closed: senders hold it shared while queueing, Close
	// exclusively while closing the queue.
	mu     sync.RWMutex
	closed bool
	// countMu guards counts, the call counts not yet written; countLoop
	// writes them until stopCounts is closed, then closes countsDone.
	countMu    sync.Mutex
	counts     map[callKey]callTally
	stopCounts chan struct{}
	countsDone chan struct{}
	stopOnce   sync.Once
	// forgetMu guards toForget: the cards of writes that outlived their
	// calls, marked not returned at the end of the next batch (so after
	// the write, the writer being FIFO); wakePending is set while a job to
	// run such a batch is on its way.
	forgetMu    sync.Mutex
	toForget    []CardRecord
	wakePending atomic.Bool
}

// Errors of the write path.
var (
	// ErrClosed is returned for a record offered after Close.
	ErrClosed = errors.New("store is closed")
	// ErrStalled is returned when the database did not commit within the
	// store's bound or before the caller's ctx ended (the error then also
	// wraps ctx.Err()); the record may still become durable later.
	ErrStalled = errors.New("store did not commit in time")
	// ErrQueueFull is returned at once, without waiting, for a record
	// offered while Options.QueueSize records wait for the writer; the
	// record is not stored.
	ErrQueueFull = errors.New("store queue is full")
)

// UnavailableKind reports whether err means the store could not take a
// record for now (a retry later may succeed) and why: "store-queue-full"
// (ErrQueueFull), "store-closed" (ErrClosed), "store-timeout" (ErrStalled,
// a deadline, a PostgreSQL statement timeout or a network timeout) or
// "store-busy" (SQLite's database is locked; PostgreSQL lock,
// serialization, deadlock, connection and shutdown errors; a refused or
// cut connection). Any other error, a constraint violation included,
// gives ok false.
func UnavailableKind(err error) (kind string, ok bool) {
	var pg *pgconn.PgError
	var netErr net.Error
	var connErr *pgconn.ConnectError
	switch {
	case err == nil:
		return "", false
	case errors.Is(err, ErrQueueFull):
		return "store-queue-full", true
	case errors.Is(err, ErrClosed):
		return "store-closed", true
	case errors.Is(err, ErrStalled), errors.Is(err, context.DeadlineExceeded):
		return "store-timeout", true
	case errors.As(err, &pg):
		return pgUnavailable(pg.Code)
	case sqliteBusy(err):
		return "store-busy", true
	case errors.As(err, &netErr) && netErr.Timeout():
		return "store-timeout", true
	case errors.As(err, &connErr), errors.Is(err, driver.ErrBadConn), errors.Is(err, io.ErrUnexpectedEOF),
		errors.Is(err, syscall.ECONNREFUSED), errors.Is(err, syscall.ECONNRESET):
		return "store-busy", true
	}
	return "", false
}

// sqliteBusy reports whether err is SQLite's "database is locked"
// (SQLITE_BUSY or SQLITE_LOCKED, with any extended code).
func sqliteBusy(err error) bool {
	var lite *sqlite.Error
	if !errors.As(err, &lite) {
		return false
	}
	code := lite.Code() & 0xff
	return code == sqlite3.SQLITE_BUSY || code == sqlite3.SQLITE_LOCKED
}

// pgUnavailable classifies a PostgreSQL error code
// (https://www.postgresql.org/docs/current/errcodes-appendix.html).
func pgUnavailable(code string) (string, bool) {
	switch {
	case code == "57014": // query_canceled: the statement timeout
		return "store-timeout", true
	case strings.HasPrefix(code, "08"), // connection exception
		strings.HasPrefix(code, "40"),  // serialization failure, deadlock
		strings.HasPrefix(code, "57P"), // admin, crash shutdown, cannot connect now
		code == "55P03",                // lock_not_available
		code == "53300":                // too_many_connections
		return "store-busy", true
	}
	return "", false
}

type job struct {
	ctx  context.Context // ends when the caller stops waiting
	run  func(context.Context, *sql.Tx) error
	errc chan error
}

// dialect is what differs between the back ends.
type dialect struct {
	name string // migrations directory
	// bind rewrites "?" placeholders for the driver.
	bind func(string) string
}

var (
	sqliteDialect   = dialect{name: "sqlite", bind: func(q string) string { return q }}
	postgresDialect = dialect{name: "postgres", bind: dollarPlaceholders}
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
	MaxBatch int // records per transaction at most (default 256)
	// QueueSize is how many records may wait for the writer (default
	// 1024); past it a record is refused at once with ErrQueueFull.
	QueueSize int
	// CommitTimeout bounds one batch's transaction (default 5 s); a caller
	// waits at most twice this (its turn, then its batch), or less if its
	// ctx ends first, and then gets ErrStalled, so a stalled database
	// cannot hang calls or Close.
	CommitTimeout time.Duration
	// SQLiteSynchronous is SQLite's synchronous setting for the WAL:
	// SyncFull (the default) syncs every commit to disk before a card
	// leaves; SyncNormal writes each commit to the WAL without syncing it,
	// so a commit survives a crash of halite but not of the machine (or a
	// power loss), and the disk's sync stalls stay off the call's path
	// (checkpoints sync beside the writer; see checkpointer). Ignored for
	// PostgreSQL.
	SQLiteSynchronous string
	// CheckpointEvery is how often the SQLite WAL is copied into the
	// database file, off the writer's path (default 1 s); WALRestartFrames
	// is the WAL size, in pages, past which the copy also starts the WAL
	// over, holding new commits for at most restartWait (default 8,192
	// pages, 32 MiB). NoCheckpointer leaves checkpoints to the serving
	// process, for a short-lived reader of its database (halite report).
	CheckpointEvery  time.Duration
	WALRestartFrames int
	NoCheckpointer   bool
	// Log receives checkpoint and call-count failures; nil discards them.
	Log *slog.Logger
	// CountEvery is how often the call counts are written (default 10 s).
	CountEvery time.Duration
}

// SQLite synchronous settings (https://sqlite.org/pragma.html#pragma_synchronous).
const (
	SyncFull   = "full"
	SyncNormal = "normal"
)

// OpenSQLite opens (creating if needed) the database at path, applies the
// embedded migrations and starts the writer.
func OpenSQLite(path string, opt Options) (*DB, error) {
	sync := "FULL"
	switch opt.SQLiteSynchronous {
	case "", SyncFull:
	case SyncNormal:
		sync = "NORMAL"
	default:
		return nil, fmt.Errorf("open store %s: synchronous %q is not %q or %q", path, opt.SQLiteSynchronous, SyncFull, SyncNormal)
	}
	// wal_autocheckpoint(0): SQLite's own checkpoint would run inside
	// whichever commit crossed its threshold, and every call waiting on
	// that commit would wait for the copy and its sync; checkpointer does
	// it beside the writer instead.
	// _txlock=immediate: every read-write transaction begins with BEGIN
	// IMMEDIATE, taking the write lock under the busy timeout. A deferred
	// one that read first (feedback reads card_log, then writes) would get
	// "database is locked" at once, without the busy handler, if another
	// connection held the write lock when it came to write.
	dsn := "file:" + path + "?_pragma=journal_mode(WAL)&_pragma=synchronous(" + sync + ")&_pragma=wal_autocheckpoint(0)" +
		"&_pragma=foreign_keys(1)&_pragma=busy_timeout(5000)&_txlock=immediate"
	db, err := sql.Open("sqlite", dsn)
	if err != nil {
		return nil, fmt.Errorf("open store %s: %w", path, err)
	}
	s, err := start(db, sqliteDialect, opt, path)
	if err != nil {
		return nil, err
	}
	if opt.NoCheckpointer {
		return s, nil
	}
	conn, err := db.Conn(context.Background())
	if err != nil {
		s.Close()
		return nil, fmt.Errorf("open store %s: %w", path, err)
	}
	// The restart waits for readers through the busy handler, and holds
	// new commits while it waits: on its own connection the wait is short.
	if _, err := conn.ExecContext(context.Background(), `PRAGMA busy_timeout = `+strconv.FormatInt(restartWait.Milliseconds(), 10)); err != nil {
		conn.Close()
		s.Close()
		return nil, fmt.Errorf("open store %s: %w", path, err)
	}
	s.stopCheckpoints, s.checkpointsDone = make(chan struct{}), make(chan struct{})
	go s.checkpointer(conn)
	return s, nil
}

// restartWait bounds how long a WAL restart may hold new commits waiting
// for a reader; a restart a reader kept from finishing is not tried again
// for restartBackoff, so that a long reader (halite report) cannot make
// the writer wait again and again.
const (
	restartWait    = 100 * time.Millisecond
	restartBackoff = 5 * time.Second
)

// checkpointer copies the WAL into the database file every
// CheckpointEvery with a PASSIVE checkpoint on its own connection, which
// never holds up the writer. A steady load can keep such copies from ever
// catching up with the writer, and the WAL is only started over once one
// has; so when the WAL has grown past WALRestartFrames, a RESTART
// checkpoint (most of the WAL already copied) starts it over. It takes
// the gate first, between two commits, so it never competes with the
// writer for the write lock (it used to, under a steady load it lost, and
// the 5-second backoff meant for readers let the WAL grow by seconds of
// writes); it then holds new commits while it waits, at most restartWait,
// for readers, and is not tried again for restartBackoff if a reader kept
// it from finishing. A failure is logged when it starts and when it ends,
// not every second.
func (s *DB) checkpointer(conn *sql.Conn) {
	defer close(s.checkpointsDone)
	defer conn.Close()
	t := time.NewTicker(s.opt.CheckpointEvery)
	defer t.Stop()
	failing := false
	var restartAfter time.Time
	for {
		select {
		case <-s.stopCheckpoints:
			return
		case <-t.C:
		}
		blocked, err := s.checkpoint(conn, time.Now().After(restartAfter))
		if blocked {
			restartAfter = time.Now().Add(restartBackoff)
		}
		if s.opt.Log != nil && (err != nil) != failing {
			if err != nil {
				s.opt.Log.Warn("store checkpoint failed; retried every interval", "error", err.Error())
			} else {
				s.opt.Log.Info("store checkpoint recovered")
			}
		}
		failing = err != nil
	}
}

// checkpoint runs one PASSIVE checkpoint and, when restart is allowed and
// the WAL is still over its bound, a RESTART one; blocked reports a
// RESTART that a reader kept from finishing (not an error: it is tried
// again later).
func (s *DB) checkpoint(conn *sql.Conn, restart bool) (blocked bool, err error) {
	ctx, cancel := context.WithTimeout(context.Background(), s.opt.CommitTimeout)
	defer cancel()
	var busy, frames, copied int
	if err := conn.QueryRowContext(ctx, `PRAGMA wal_checkpoint(PASSIVE)`).Scan(&busy, &frames, &copied); err != nil {
		return false, fmt.Errorf("checkpoint: %w", err)
	}
	if !restart || frames <= s.opt.WALRestartFrames {
		return false, nil
	}
	s.gate.Lock()
	defer s.gate.Unlock()
	if err := conn.QueryRowContext(ctx, `PRAGMA wal_checkpoint(RESTART)`).Scan(&busy, &frames, &copied); err != nil {
		return false, fmt.Errorf("checkpoint restart: %w", err)
	}
	return busy == 1, nil
}

// OpenPostgres connects to PostgreSQL at dsn (a postgres:// URL) through a
// pooled pgx connection, applies the embedded migrations and starts the
// writer.
// Each write transaction sets its own statement_timeout (SET LOCAL) to
// the commit bound, so a stuck statement is ended on the server as well;
// migrations and reads keep the server's setting.
func OpenPostgres(dsn string, opt Options) (*DB, error) {
	db, err := sql.Open("pgx", dsn)
	if err != nil {
		return nil, fmt.Errorf("open store: %w", err)
	}
	db.SetMaxOpenConns(8)
	return start(db, postgresDialect, opt, "postgres")
}

func (o Options) withDefaults() Options {
	if o.MaxBatch <= 0 {
		o.MaxBatch = 256
	}
	if o.QueueSize <= 0 {
		o.QueueSize = 1024
	}
	if o.CommitTimeout <= 0 {
		o.CommitTimeout = 5 * time.Second
	}
	if o.CheckpointEvery <= 0 {
		o.CheckpointEvery = time.Second
	}
	if o.WALRestartFrames <= 0 {
		o.WALRestartFrames = 8192
	}
	if o.CountEvery <= 0 {
		o.CountEvery = 10 * time.Second
	}
	return o
}

func start(db *sql.DB, d dialect, opt Options, name string) (*DB, error) {
	opt = opt.withDefaults()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	if err := migrate(ctx, db, d); err != nil {
		db.Close()
		return nil, fmt.Errorf("open store %s: %w", name, err)
	}
	s := &DB{db: db, dialect: d, opt: opt, jobs: make(chan job, opt.QueueSize), done: make(chan struct{}),
		counts: map[callKey]callTally{}, stopCounts: make(chan struct{}), countsDone: make(chan struct{})}
	go s.writer()
	go s.countLoop()
	return s, nil
}

// migrationLock is the key of the PostgreSQL advisory lock that
// serialises migrations of replicas starting together.
const migrationLock int64 = 0x68616c6974650001 // "halite", 1

// migrate applies the embedded migrations not yet recorded, each in its
// own transaction that checks and records its version. Concurrent
// openers are serialised: on PostgreSQL by an advisory lock held on one
// connection for the whole run, on SQLite by BEGIN IMMEDIATE (_txlock).
func migrate(ctx context.Context, db *sql.DB, d dialect) (err error) {
	conn, err := connect(ctx, db)
	if err != nil {
		return fmt.Errorf("migrate: connect: %w", err)
	}
	defer conn.Close()
	if d.name == "postgres" {
		if _, err := conn.ExecContext(ctx, `SELECT pg_advisory_lock($1)`, migrationLock); err != nil {
			return fmt.Errorf("migrate: lock: %w", err)
		}
		defer func() {
			if _, uerr := conn.ExecContext(ctx, `SELECT pg_advisory_unlock($1)`, migrationLock); uerr != nil {
				// The session would keep the lock in the pool: drop it.
				conn.Raw(func(any) error { return driver.ErrBadConn })
				err = errors.Join(err, fmt.Errorf("migrate: unlock: %w", uerr))
			}
		}()
	}
	if _, err := conn.ExecContext(ctx, `CREATE TABLE IF NOT EXISTS schema_migrations (version TEXT PRIMARY KEY, applied_at TEXT NOT NULL)`); err != nil {
		return fmt.Errorf("migrate: schema_migrations: %w", err)
	}
	names, err := fs.Glob(migrations, "migrations/"+d.name+"/*.sql")
	if err != nil {
		return fmt.Errorf("migrate: %w", err)
	}
	sort.Strings(names)
	for _, name := range names {
		version := strings.TrimSuffix(name[strings.LastIndex(name, "/")+1:], ".sql")
		if err := migrateOne(ctx, conn, d, name, version); err != nil {
			return fmt.Errorf("migrate %s: %w", version, err)
		}
	}
	return nil
}

// connect takes a connection, retrying while SQLite is busy until ctx
// ends: a new SQLite file is switched to WAL by its first connection, and
// another process connecting meanwhile is told "database is locked" at
// once, without the busy timeout (rollback-journal locking does not wait
// where waiting could deadlock).
func connect(ctx context.Context, db *sql.DB) (*sql.Conn, error) {
	for {
		conn, err := db.Conn(ctx)
		if !sqliteBusy(err) {
			return conn, err
		}
		select {
		case <-ctx.Done():
			return nil, fmt.Errorf("%w (%w)", err, ctx.Err())
		case <-time.After(10 * time.Millisecond):
		}
	}
}

// migrateOne applies migration file name unless version is recorded. It
// reads the record first outside a transaction, so opening a migrated
// database (halite report beside the server) takes no write lock, then
// again inside the one that applies it, which another opener may have
// done meanwhile.
func migrateOne(ctx context.Context, conn *sql.Conn, d dialect, name, version string) error {
	recorded := d.bind(`SELECT count(*) FROM schema_migrations WHERE version = ?`)
	var n int
	if err := conn.QueryRowContext(ctx, recorded, version).Scan(&n); err != nil || n > 0 {
		return err
	}
	tx, err := conn.BeginTx(ctx, nil)
	if err != nil {
		return err
	}
	defer tx.Rollback()
	if err := tx.QueryRowContext(ctx, recorded, version).Scan(&n); err != nil || n > 0 {
		return err
	}
	ddl, err := migrations.ReadFile(name)
	if err != nil {
		return err
	}
	if _, err := tx.ExecContext(ctx, string(ddl)); err != nil {
		return err
	}
	if _, err := tx.ExecContext(ctx, d.bind(`INSERT INTO schema_migrations VALUES (?, ?)`), version, time.Now().UTC().Format(time.RFC3339)); err != nil {
		return err
	}
	return tx.Commit()
}

// writer runs batches until Close. A batch is whatever queued while the
// previous one committed: concurrent calls share a transaction, and a
// lone call is not kept waiting for company.
func (s *DB) writer() {
	defer close(s.done)
	for first := range s.jobs {
		batch := []job{first}
	collect:
		for len(batch) < s.opt.MaxBatch {
			select {
			case j, ok := <-s.jobs:
				if !ok {
					break collect
				}
				batch = append(batch, j)
			default:
				break collect
			}
		}
		s.commit(batch)
	}
}

// commit runs a batch in one transaction, bounded by CommitTimeout, each
// job in a savepoint; jobs whose caller stopped waiting are skipped.
func (s *DB) commit(batch []job) {
	live := batch[:0]
	for _, j := range batch {
		if err := j.ctx.Err(); err != nil {
			j.errc <- err
			continue
		}
		live = append(live, j)
	}
	if batch = live; len(batch) == 0 {
		return
	}
	s.gate.Lock()
	defer s.gate.Unlock()
	ctx, cancel := context.WithTimeout(context.Background(), s.opt.CommitTimeout)
	defer cancel()
	errs := make([]error, len(batch))
	tx, err := s.db.BeginTx(ctx, nil)
	if err == nil && s.dialect.name == "postgres" {
		_, err = tx.ExecContext(ctx, `SET LOCAL statement_timeout = `+strconv.FormatInt(s.opt.CommitTimeout.Milliseconds(), 10))
	}
	if err == nil {
		// A failed SAVEPOINT, ROLLBACK TO or RELEASE leaves the transaction
		// in an unknown state: the whole batch then fails and is rolled back.
		for i, j := range batch {
			if errs[i] = j.ctx.Err(); errs[i] != nil {
				continue
			}
			if _, err = tx.ExecContext(ctx, `SAVEPOINT job`); err != nil {
				break
			}
			if errs[i] = stalled(ctx, j.run(ctx, tx)); errs[i] != nil {
				if _, err = tx.ExecContext(ctx, `ROLLBACK TO SAVEPOINT job`); err != nil {
					break
				}
			}
			if _, err = tx.ExecContext(ctx, `RELEASE SAVEPOINT job`); err != nil {
				break
			}
		}
		// The cards of writes that outlived their calls, after this batch's
		// own records (one of them may be such a write).
		forget := s.takeForget()
		if err == nil && len(forget) > 0 {
			if _, err = tx.ExecContext(ctx, `SAVEPOINT forget`); err == nil {
				if ferr := s.markNotReturned(ctx, tx, forget); ferr != nil {
					_, err = tx.ExecContext(ctx, `ROLLBACK TO SAVEPOINT forget`)
					if s.opt.Log != nil {
						s.opt.Log.Warn("cards of a stalled write not yet marked as not returned", "cards", len(forget), "error", ferr.Error())
					}
					s.putBackForget(forget)
					forget = nil
				}
				if err == nil {
					_, err = tx.ExecContext(ctx, `RELEASE SAVEPOINT forget`)
				}
			}
		}
		if err == nil {
			err = tx.Commit()
		}
		if err != nil {
			tx.Rollback()
			s.putBackForget(forget)
		}
	}
	err = stalled(ctx, err)
	for i, j := range batch {
		if err != nil {
			errs[i] = fmt.Errorf("store commit: %w", err)
		}
		j.errc <- errs[i]
	}
}

// stalled marks err as ErrStalled when the commit bound ended it: ctx,
// the batch's, ran out, or PostgreSQL's statement timeout (the same
// bound) fired first.
func stalled(ctx context.Context, err error) error {
	var pg *pgconn.PgError
	if err == nil || ctx.Err() == nil && !(errors.As(err, &pg) && pg.Code == "57014") {
		return err
	}
	return fmt.Errorf("%w: %w", ErrStalled, err)
}

// do queues run for the writer and waits for its commit until ctx ends
// or two commit bounds pass (ErrStalled; the record may still commit).
// A full queue refuses the record at once with ErrQueueFull. run may
// still be running after do returns an error: read what it sets only
// after a nil error.
func (s *DB) do(ctx context.Context, run func(context.Context, *sql.Tx) error) error {
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("store: %w", err)
	}
	// The job's ctx ends when do returns, so the writer skips a job whose
	// caller has stopped waiting.
	ctx, cancel := context.WithTimeout(ctx, 2*s.opt.CommitTimeout)
	defer cancel()
	j := job{ctx: ctx, run: run, errc: make(chan error, 1)}
	s.mu.RLock()
	if s.closed {
		s.mu.RUnlock()
		return ErrClosed
	}
	select {
	case s.jobs <- j:
		s.mu.RUnlock()
	default:
		s.mu.RUnlock()
		return ErrQueueFull
	}
	select {
	case err := <-j.errc:
		return err
	case <-ctx.Done():
		select {
		case err := <-j.errc: // committed as ctx ended
			return err
		default:
			return fmt.Errorf("%w: %w", ErrStalled, ctx.Err())
		}
	}
}

// LogCards implements Store.
func (s *DB) LogCards(ctx context.Context, cards []CardRecord) error {
	if len(cards) == 0 {
		return nil
	}
	err := s.logCards(ctx, cards)
	if errors.Is(err, ErrStalled) {
		// The caller answers 503 without these cards, but the write may
		// still commit: mark them not returned once it has, so no later
		// call takes them for cards the clinician saw.
		s.forgetMu.Lock()
		s.toForget = append(s.toForget, cards...)
		s.forgetMu.Unlock()
		s.wakeForForget()
	}
	return err
}

// NotReturned marks, in the card log, cards whose write outlived the call
// that made them (answered 503): never shown, they hold nothing back.
const NotReturned = "not-returned"

// wakeForForget queues one empty job, so that a batch runs and marks the
// cards waiting in toForget even when no call writes; one at a time, and
// none needed if a batch runs first anyway.
func (s *DB) wakeForForget() {
	if !s.wakePending.CompareAndSwap(false, true) {
		return
	}
	go func() {
		ctx, cancel := context.WithTimeout(context.Background(), 4*s.opt.CommitTimeout)
		defer cancel()
		if err := s.do(ctx, func(context.Context, *sql.Tx) error { return nil }); err != nil {
			s.wakePending.Store(false) // the next stalled write tries again
		}
	}()
}

// takeForget empties toForget.
func (s *DB) takeForget() []CardRecord {
	s.forgetMu.Lock()
	defer s.forgetMu.Unlock()
	cards := s.toForget
	s.toForget = nil
	s.wakePending.Store(false)
	return cards
}

// putBackForget returns cards to toForget after a batch that could not
// mark them.
func (s *DB) putBackForget(cards []CardRecord) {
	s.forgetMu.Lock()
	s.toForget = append(s.toForget, cards...)
	s.forgetMu.Unlock()
}

// markNotReturned marks cards not returned and removes them from
// card_latest, in tx.
func (s *DB) markNotReturned(ctx context.Context, tx *sql.Tx, cards []CardRecord) error {
	for _, c := range cards {
		if _, err := tx.ExecContext(ctx, s.dialect.bind(`UPDATE card_log SET suppressed = ? WHERE card_uuid = ? AND suppressed = ''`), NotReturned, c.UUID); err != nil {
			return err
		}
		if _, err := tx.ExecContext(ctx, s.dialect.bind(`DELETE FROM card_latest WHERE patient_hash = ? AND service = ? AND issuer = ? AND tenant = ?
			AND rule = ? AND subject = ? AND moment = ? AND created_at = ?`),
			c.PatientHash, c.Service, c.Issuer, c.Tenant, c.Rule, c.Subject, c.Moment, c.At.UTC().Format(tsFormat)); err != nil {
			return err
		}
	}
	return nil
}

// logCards writes cards and their card_latest entries in one commit.
func (s *DB) logCards(ctx context.Context, cards []CardRecord) error {
	return s.do(ctx, func(ctx context.Context, tx *sql.Tx) error {
		for _, c := range cards {
			fig, err := json.Marshal(c.Figures)
			if err != nil {
				return fmt.Errorf("log card %s: %w", c.UUID, err)
			}
			sugg, _ := json.Marshal(nonNil(c.Suggestions))
			if _, err := tx.ExecContext(ctx, s.dialect.bind(`INSERT INTO card_log (card_uuid, service, rule, indicator, ruleset, issuer, tenant, patient_hash, created_at, figures, suggestions, moment, subject, draft, suppressed)
				VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)`), c.UUID, c.Service, c.Rule, c.Indicator, c.Ruleset, c.Issuer, c.Tenant, c.PatientHash,
				c.At.UTC().Format(tsFormat), string(fig), string(sugg), c.Moment, c.Subject, c.Draft, c.Suppressed); err != nil {
				return fmt.Errorf("log card %s: %w", c.UUID, err)
			}
			if c.Suppressed != "" {
				continue
			}
			if _, err := tx.ExecContext(ctx, s.dialect.bind(`INSERT INTO card_latest (patient_hash, service, issuer, tenant, rule, subject, moment, draft, indicator, figures, created_at)
				VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (patient_hash, service, issuer, tenant, rule, subject, moment) DO UPDATE SET
				draft = excluded.draft, indicator = excluded.indicator, figures = excluded.figures, created_at = excluded.created_at
				WHERE excluded.created_at >= card_latest.created_at`),
				c.PatientHash, c.Service, c.Issuer, c.Tenant, c.Rule, c.Subject, c.Moment, c.Draft, c.Indicator, string(fig), c.At.UTC().Format(tsFormat)); err != nil {
				return fmt.Errorf("log card %s: latest: %w", c.UUID, err)
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

// RecordFeedback implements Store: the entries are stored together or,
// if any names a card or suggestion the caller was not given, not at all.
func (s *DB) RecordFeedback(ctx context.Context, entries []FeedbackRecord) error {
	if len(entries) == 0 {
		return nil
	}
	return s.do(ctx, func(ctx context.Context, tx *sql.Tx) error {
		for i, f := range entries {
			if err := s.recordOne(ctx, tx, f); err != nil {
				return &EntryError{Index: i, Err: err}
			}
		}
		return nil
	})
}

func (s *DB) recordOne(ctx context.Context, tx *sql.Tx, f FeedbackRecord) error {
	var raw string
	var c CardRecord
	var fig, at string
	err := tx.QueryRowContext(ctx, s.dialect.bind(`SELECT suggestions, patient_hash, rule, subject, moment, draft, indicator, figures, created_at
		FROM card_log WHERE card_uuid = ? AND service = ? AND issuer = ? AND tenant = ? AND suppressed = ''`),
		f.Card, f.Service, f.Issuer, f.Tenant).Scan(&raw, &c.PatientHash, &c.Rule, &c.Subject, &c.Moment, &c.Draft, &c.Indicator, &fig, &at)
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
	// ON CONFLICT DO NOTHING (not SQLite's INSERT OR IGNORE, which would
	// also swallow a CHECK violation): only an exact repeat is ignored.
	_, err = tx.ExecContext(ctx, s.dialect.bind(`INSERT INTO feedback (card_uuid, outcome, outcome_at, accepted, reason_system, reason_code, user_comment, received_at)
		VALUES (?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING`), f.Card, f.Outcome, f.OutcomeAt.UTC().Format(tsFormat), string(acc),
		f.ReasonSystem, f.ReasonCode, f.UserComment, time.Now().UTC().Format(tsFormat))
	if err != nil {
		return fmt.Errorf("record feedback: %w", err)
	}
	if f.Outcome != Overridden || f.ReasonCode == "" {
		return nil
	}
	// An override with a reason is what the repeat lookup remembers (the
	// latest one per rule, product and moment).
	// The EHR's outcome time, but never later than now (a clock ahead, or
	// local time sent as UTC, must not stretch the override period) nor
	// earlier than the card.
	overAt := f.OutcomeAt
	if now := time.Now(); overAt.After(now) {
		overAt = now
	}
	when := max(overAt.UTC().Format(tsFormat), at) // nor before the card was shown
	_, err = tx.ExecContext(ctx, s.dialect.bind(`INSERT INTO card_latest (patient_hash, service, issuer, tenant, rule, subject, moment, draft, indicator, figures, created_at,
		override_at, override_draft, override_indicator, override_figures, override_shown_at)
		VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (patient_hash, service, issuer, tenant, rule, subject, moment) DO UPDATE SET
		override_at = excluded.override_at, override_draft = excluded.override_draft, override_indicator = excluded.override_indicator,
		override_figures = excluded.override_figures, override_shown_at = excluded.override_shown_at
		WHERE excluded.override_at > card_latest.override_at`),
		c.PatientHash, f.Service, f.Issuer, f.Tenant, c.Rule, c.Subject, c.Moment, c.Draft, c.Indicator, fig, at, when, c.Draft, c.Indicator, fig, at)
	if err != nil {
		return fmt.Errorf("record feedback: latest: %w", err)
	}
	return nil
}

// PriorCards implements Store from card_latest, which LogCards and
// RecordFeedback keep: per rule, product and moment, the latest card shown
// and the latest card overridden with a reason. It reads beside the
// writer, so a card committed by any replica before the lookup is seen.
func (s *DB) PriorCards(ctx context.Context, q PriorQuery) ([]PriorCard, error) {
	rows, err := s.db.QueryContext(ctx, s.dialect.bind(`SELECT rule, subject, moment, draft, indicator, figures, created_at,
		override_at, override_draft, override_indicator, override_figures, override_shown_at
		FROM card_latest WHERE patient_hash = ? AND service = ? AND issuer = ? AND tenant = ?`),
		q.PatientHash, q.Service, q.Issuer, q.Tenant)
	if err != nil {
		return nil, fmt.Errorf("prior cards: %w", err)
	}
	defer rows.Close()
	since, until := q.Since.UTC().Format(tsFormat), q.Until.UTC().Format(tsFormat)
	var out []PriorCard
	for rows.Next() {
		var latest, over PriorCard
		var fig, at, overAt, overFig, overShown string
		if err := rows.Scan(&latest.Rule, &latest.Subject, &latest.Moment, &latest.Draft, &latest.Indicator, &fig, &at,
			&overAt, &over.Draft, &over.Indicator, &overFig, &overShown); err != nil {
			return nil, fmt.Errorf("prior cards: %w", err)
		}
		over.Rule, over.Subject, over.Moment = latest.Rule, latest.Subject, latest.Moment
		overridden := overAt != "" && overAt >= since && overShown <= until
		if overridden && overShown == at && over.Draft == latest.Draft {
			at = "" // the latest card is the one overridden: one entry
		}
		if at != "" && at >= since && at <= until {
			if err := readPrior(&latest, fig, at, ""); err != nil {
				return nil, err
			}
			out = append(out, latest)
		}
		if overridden {
			if err := readPrior(&over, overFig, overShown, overAt); err != nil {
				return nil, err
			}
			out = append(out, over)
		}
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("prior cards: %w", err)
	}
	slices.SortFunc(out, func(a, b PriorCard) int { return b.At.Compare(a.At) })
	return out[:min(len(out), MaxPriorCards)], nil
}

// readPrior fills p's figures and times from their stored forms.
func readPrior(p *PriorCard, fig, at, overAt string) error {
	if err := json.Unmarshal([]byte(fig), &p.Figures); err != nil {
		return fmt.Errorf("prior cards: figures: %w", err)
	}
	var err error
	if p.At, err = time.Parse(tsFormat, at); err != nil {
		return fmt.Errorf("prior cards: %w", err)
	}
	if overAt != "" {
		if p.OverriddenAt, err = time.Parse(tsFormat, overAt); err != nil {
			return fmt.Errorf("prior cards: %w", err)
		}
	}
	return nil
}

// purgeChunk is how many rows one purge transaction deletes at most, so a
// large backlog is cleared in short transactions that share the writer.
const purgeChunk = 5000

// Purge implements Store. It also sweeps JWT replay entries whose token
// has expired, so the replay table stays the size of the live tokens.
// Both are deleted in chunks of purgeChunk rows, each its own commit.
func (s *DB) Purge(ctx context.Context, before time.Time) (int64, error) {
	cards, err := s.deleteChunks(ctx, `DELETE FROM card_log WHERE card_uuid IN
		(SELECT card_uuid FROM card_log WHERE created_at < ? LIMIT `+strconv.Itoa(purgeChunk)+`)`, before.UTC().Format(tsFormat))
	if err != nil {
		return cards, fmt.Errorf("purge: %w", err)
	}
	// The conditions are repeated outside the chunk's subquery, so a row
	// another replica refreshed meanwhile is not deleted.
	b := before.UTC().Format(tsFormat)
	if _, err := s.deleteChunks(ctx, `DELETE FROM card_latest WHERE created_at < ? AND override_at < ?
		AND (patient_hash, service, issuer, tenant, rule, subject, moment) IN
		(SELECT patient_hash, service, issuer, tenant, rule, subject, moment FROM card_latest WHERE created_at < ? AND override_at < ?
		LIMIT `+strconv.Itoa(purgeChunk)+`)`, b, b, b, b); err != nil {
		return cards, fmt.Errorf("purge latest cards: %w", err)
	}
	if _, err := s.deleteChunks(ctx, `DELETE FROM call_counts WHERE period < ? AND (period, service, hook, issuer, tenant, ruleset) IN
		(SELECT period, service, hook, issuer, tenant, ruleset FROM call_counts WHERE period < ? LIMIT `+strconv.Itoa(purgeChunk)+`)`,
		periodOf(before), periodOf(before)); err != nil {
		return cards, fmt.Errorf("purge call counts: %w", err)
	}
	if _, err := s.deleteChunks(ctx, `DELETE FROM jwt_replay WHERE (iss, jti) IN
		(SELECT iss, jti FROM jwt_replay WHERE until <= ? LIMIT `+strconv.Itoa(purgeChunk)+`)`, time.Now().UTC().Format(tsFormat)); err != nil {
		return cards, fmt.Errorf("purge replay cache: %w", err)
	}
	return cards, nil
}

// deleteChunks runs a chunked DELETE until a chunk deletes fewer than
// purgeChunk rows, returning the total deleted.
func (s *DB) deleteChunks(ctx context.Context, query string, args ...any) (int64, error) {
	var total int64
	for {
		var n int64
		err := s.do(ctx, func(ctx context.Context, tx *sql.Tx) error {
			res, err := tx.ExecContext(ctx, s.dialect.bind(query), args...)
			if err != nil {
				return err
			}
			n, err = res.RowsAffected()
			return err
		})
		if err != nil {
			return total, err
		}
		if total += n; n < purgeChunk {
			return total, nil
		}
	}
}

// Ping checks that the database answers a query within ctx (readiness);
// after Close it returns ErrClosed.
func (s *DB) Ping(ctx context.Context) error {
	s.mu.RLock()
	closed := s.closed
	s.mu.RUnlock()
	if closed {
		return ErrClosed
	}
	var one int
	if err := s.db.QueryRowContext(ctx, `SELECT 1`).Scan(&one); err != nil {
		return fmt.Errorf("store ping: %w", err)
	}
	return nil
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
	// The last call counts are written while the writer still runs.
	s.stopOnce.Do(func() {
		close(s.stopCounts)
		<-s.countsDone
		s.forgetMu.Lock()
		pending := len(s.toForget) > 0
		s.forgetMu.Unlock()
		if pending { // a last batch marks them
			ctx, cancel := context.WithTimeout(context.Background(), 2*s.opt.CommitTimeout)
			s.do(ctx, func(context.Context, *sql.Tx) error { return nil })
			cancel()
		}
	})
	s.mu.Lock()
	if s.closed {
		s.mu.Unlock()
		return nil
	}
	s.closed = true
	close(s.jobs)
	s.mu.Unlock()
	<-s.done
	if s.stopCheckpoints != nil {
		close(s.stopCheckpoints)
		<-s.checkpointsDone
	}
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
	err := s.do(ctx, func(ctx context.Context, tx *sql.Tx) error {
		now := time.Now().UTC().Format(tsFormat)
		if _, err := tx.ExecContext(ctx, s.dialect.bind(`DELETE FROM jwt_replay WHERE iss = ? AND jti = ? AND until <= ?`), iss, jti, now); err != nil {
			return fmt.Errorf("replay cache: %w", err)
		}
		res, err := tx.ExecContext(ctx, s.dialect.bind(`INSERT INTO jwt_replay (iss, jti, until) VALUES (?, ?, ?) ON CONFLICT DO NOTHING`),
			iss, jti, until.UTC().Format(tsFormat))
		if err != nil {
			return fmt.Errorf("replay cache: %w", err)
		}
		n, err := res.RowsAffected()
		seen = n == 0
		return err
	})
	if err != nil {
		return false, err
	}
	return seen, nil
}
