package feedback

import (
	"bufio"
	"bytes"
	"context"
	"database/sql"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"math/rand/v2"
	"net"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgconn"
)

// TestStoreQueueBounded: under a held lock, a caller whose ctx ends
// first stops waiting then (ErrStalled wrapping the ctx's error), and
// with QueueSize 2 and one batch in flight, calls past the queue are
// refused at once with ErrQueueFull instead of waiting.
func TestStoreQueueBounded(t *testing.T) {
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			const bound = 2 * time.Second
			s, release := b.stalled(t, Options{CommitTimeout: bound, QueueSize: 2, MaxBatch: 1})
			ctx, cancel := context.WithTimeout(context.Background(), 200*time.Millisecond)
			defer cancel()
			start := time.Now()
			err := s.LogCards(ctx, []CardRecord{card("short", t0)})
			if took := time.Since(start); !errors.Is(err, ErrStalled) || !errors.Is(err, context.DeadlineExceeded) || took >= bound {
				t.Errorf("caller with a 200 ms ctx: %v after %v; want ErrStalled and DeadlineExceeded, before the %v commit bound", err, took, bound)
			}
			const calls = 8
			type result struct {
				err  error
				took time.Duration
			}
			results := make(chan result, calls)
			for i := range calls {
				go func() {
					start := time.Now()
					err := s.LogCards(context.Background(), []CardRecord{card(fmt.Sprint("flood-", i), t0)})
					results <- result{err, time.Since(start)}
				}()
			}
			full := 0
			for range calls {
				r := <-results
				switch {
				case errors.Is(r.err, ErrQueueFull):
					full++
					if r.took >= bound {
						t.Errorf("refused after %v; want at once", r.took)
					}
				case !errors.Is(r.err, ErrStalled):
					t.Errorf("queued call under a held lock: %v; want ErrStalled", r.err)
				}
			}
			// At most one in the writer's batch and two in the queue.
			if full < calls-3 {
				t.Errorf("%d of %d concurrent calls refused with ErrQueueFull; want at least %d", full, calls, calls-3)
			}
			release()
			// The queued writes drain once the lock is released; until they
			// have, the bounded queue may still refuse (as it should). A
			// write must succeed within the commit bound.
			for deadline := time.Now().Add(bound); ; time.Sleep(20 * time.Millisecond) {
				err = s.LogCards(context.Background(), []CardRecord{card("after", t0)})
				if !errors.Is(err, ErrQueueFull) || time.Now().After(deadline) {
					break
				}
			}
			if err != nil {
				t.Errorf("write after the lock was released: %v", err)
			}
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
		})
	}
}

// TestCallerLeavesMidBatch: a caller whose ctx ends after the writer ran
// its record but before the batch committed (a later record is blocked
// on a table lock) gets ErrStalled, does not read what its record set
// (checked by -race), and its record still commits with the batch.
// PostgreSQL only: on SQLite a batch waits for the write lock at BEGIN,
// before any record.
func TestCallerLeavesMidBatch(t *testing.T) {
	dsn := os.Getenv("HALITE_TEST_POSTGRES_DSN")
	if dsn == "" {
		t.Skip("HALITE_TEST_POSTGRES_DSN not set")
	}
	ctx := context.Background()
	for _, tc := range []struct {
		name      string
		call      func(context.Context, *DB) error
		committed func(*DB) bool
	}{
		{"remember", func(ctx context.Context, s *DB) error {
			_, err := s.Remember(ctx, "iss", "jti", time.Now().Add(time.Minute))
			return err
		}, func(s *DB) bool {
			seen, err := s.Remember(ctx, "iss", "jti", time.Now().Add(time.Minute))
			return err == nil && seen
		}},
		{"purge", func(ctx context.Context, s *DB) error {
			_, err := s.Purge(ctx, t0.Add(-time.Hour))
			return err
		}, nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			schemaDSN := freshSchema(t, dsn)
			s, err := OpenPostgres(schemaDSN, Options{})
			if err != nil {
				t.Fatal(err)
			}
			if err := s.LogCards(ctx, []CardRecord{card("c1", t0)}); err != nil {
				t.Fatal(err)
			}
			releaseCards := holdLock(t, "pgx", schemaDSN, "BEGIN", "LOCK TABLE card_log IN ACCESS EXCLUSIVE MODE")
			releaseFeedback := holdLock(t, "pgx", schemaDSN, "BEGIN", "LOCK TABLE feedback IN ACCESS EXCLUSIVE MODE")
			errs := make(chan error, 2)
			go func() { errs <- s.LogCards(ctx, []CardRecord{card("p", t0)}) }()
			for s.gate.TryLock() { // until the writer is in that batch, blocked
				s.gate.Unlock()
				time.Sleep(time.Millisecond)
			}
			leaving, cancel := context.WithTimeout(ctx, time.Second)
			defer cancel()
			left := make(chan error, 1)
			go func() { left <- tc.call(leaving, s) }()
			for len(s.jobs) < 1 {
				time.Sleep(time.Millisecond)
			}
			go func() {
				errs <- s.RecordFeedback(ctx, []FeedbackRecord{{Card: "c1", Service: "sodium-infusion-check", Outcome: Accepted, OutcomeAt: t0}})
			}()
			for len(s.jobs) < 2 {
				time.Sleep(time.Millisecond)
			}
			releaseCards() // the next batch: the call's record runs, the feedback waits
			if err := <-left; !errors.Is(err, ErrStalled) || !errors.Is(err, context.DeadlineExceeded) {
				t.Errorf("caller whose ctx ended mid-batch: %v; want ErrStalled and DeadlineExceeded", err)
			}
			releaseFeedback()
			for range 2 {
				if err := <-errs; err != nil {
					t.Errorf("a record of the blocked batches: %v", err)
				}
			}
			if tc.committed != nil && !tc.committed(s) {
				t.Error("the record of the caller that left did not commit with its batch")
			}
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
		})
	}
}

// TestUnavailableKind: errors that mean "not now" are told apart from
// faults and refused records.
func TestUnavailableKind(t *testing.T) {
	pg := func(code string) func(*testing.T) error {
		return func(*testing.T) error { return fmt.Errorf("store commit: %w", &pgconn.PgError{Code: code}) }
	}
	plain := func(err error) func(*testing.T) error { return func(*testing.T) error { return err } }
	for _, tc := range []struct {
		name string
		err  func(*testing.T) error
		kind string
	}{
		{"nil", plain(nil), ""},
		{"queue full", plain(fmt.Errorf("log cards: %w", ErrQueueFull)), "store-queue-full"},
		{"closed", plain(ErrClosed), "store-closed"},
		{"stalled", plain(fmt.Errorf("%w: %w", ErrStalled, context.Canceled)), "store-timeout"},
		{"deadline", plain(fmt.Errorf("store: %w", context.DeadlineExceeded)), "store-timeout"},
		{"canceled", plain(context.Canceled), ""},
		{"network timeout", plain(&net.OpError{Op: "read", Net: "tcp", Err: os.ErrDeadlineExceeded}), "store-timeout"},
		{"postgres statement timeout", pg("57014"), "store-timeout"},
		{"postgres serialization failure", pg("40001"), "store-busy"},
		{"postgres deadlock", pg("40P01"), "store-busy"},
		{"postgres lock not available", pg("55P03"), "store-busy"},
		{"postgres admin shutdown", pg("57P01"), "store-busy"},
		{"postgres cannot connect now", pg("57P03"), "store-busy"},
		{"postgres connection failure", pg("08006"), "store-busy"},
		{"postgres too many connections", pg("53300"), "store-busy"},
		{"postgres unique violation", pg("23505"), ""},
		{"postgres check violation", pg("23514"), ""},
		{"postgres undefined table", pg("42P01"), ""},
		{"postgres connection refused", postgresRefused, "store-busy"},
		{"connection cut", plain(fmt.Errorf("store ping: %w", io.ErrUnexpectedEOF)), "store-busy"},
		{"sqlite locked", sqliteLocked, "store-busy"},
		{"sqlite constraint", sqliteConstraint, ""},
		{"other", plain(errors.New("disk I/O error")), ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			err := tc.err(t)
			kind, ok := UnavailableKind(err)
			if kind != tc.kind || ok != (tc.kind != "") {
				t.Errorf("UnavailableKind(%v) = %q, %v; want %q", err, kind, ok, tc.kind)
			}
		})
	}
}

// postgresRefused is pgx's error for a port nothing listens on.
func postgresRefused(t *testing.T) error {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := ln.Addr().String()
	ln.Close()
	db, err := sql.Open("pgx", "postgres://halite@"+addr+"/halite?sslmode=disable&connect_timeout=5")
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	err = db.Ping()
	if err == nil {
		t.Fatal("a closed port answered")
	}
	return err
}

// sqliteLocked is SQLite's error for a write lock another connection
// holds, with no busy timeout.
func sqliteLocked(t *testing.T) error {
	path := filepath.Join(t.TempDir(), "locked.db")
	release := holdLock(t, "sqlite", "file:"+path, "BEGIN IMMEDIATE")
	defer release()
	db, err := sql.Open("sqlite", "file:"+path+"?_pragma=busy_timeout(0)")
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	_, err = db.Exec(`CREATE TABLE t (x)`)
	if err == nil {
		t.Fatal("wrote past a held lock")
	}
	return err
}

// sqliteConstraint is SQLite's error for a duplicate primary key.
func sqliteConstraint(t *testing.T) error {
	db, err := sql.Open("sqlite", "file:"+filepath.Join(t.TempDir(), "c.db"))
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	_, err = db.Exec(`CREATE TABLE t (x PRIMARY KEY); INSERT INTO t VALUES (1); INSERT INTO t VALUES (1)`)
	if err == nil {
		t.Fatal("a duplicate key was accepted")
	}
	return err
}

// TestPing: the store answers until it is closed, then says so.
func TestPing(t *testing.T) {
	ctx := context.Background()
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			st, _ := b.open(t)
			s := st.(*DB)
			if err := s.Ping(ctx); err != nil {
				t.Errorf("ping: %v", err)
			}
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
			if err := s.Ping(ctx); !errors.Is(err, ErrClosed) {
				t.Errorf("ping after Close: %v; want ErrClosed", err)
			}
		})
	}
}

// TestPingServerGone: when the PostgreSQL server stops answering (its
// connections cut, new ones refused), Ping fails within its ctx and the
// error is classified as the store being busy.
func TestPingServerGone(t *testing.T) {
	dsn := os.Getenv("HALITE_TEST_POSTGRES_DSN")
	if dsn == "" {
		t.Skip("HALITE_TEST_POSTGRES_DSN not set")
	}
	u, err := url.Parse(freshSchema(t, dsn))
	if err != nil {
		t.Fatal(err)
	}
	local, stop := tcpProxy(t, u.Host)
	u.Host = local
	s, err := OpenPostgres(u.String(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if err := s.Ping(context.Background()); err != nil {
		t.Fatalf("ping: %v", err)
	}
	stop()
	// The first ping finds its connection cut, the second is refused one.
	for i := range 2 {
		ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
		err := s.Ping(ctx)
		cancel()
		if kind, _ := UnavailableKind(err); err == nil || kind != "store-busy" {
			t.Errorf("ping %d with the server gone: %v (kind %q); want an error of kind store-busy", i, err, kind)
		}
	}
}

// tcpProxy forwards connections on a local port to addr until stop is
// called, which refuses new ones and cuts those open.
func tcpProxy(t *testing.T, addr string) (local string, stop func()) {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	var mu sync.Mutex
	var conns []net.Conn
	stopped := false
	go func() {
		for {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			up, err := net.Dial("tcp", addr)
			if err != nil {
				c.Close()
				continue
			}
			mu.Lock()
			if stopped {
				mu.Unlock()
				c.Close()
				up.Close()
				continue
			}
			conns = append(conns, c, up)
			mu.Unlock()
			go func() { io.Copy(up, c); up.Close() }()
			go func() { io.Copy(c, up); c.Close() }()
		}
	}()
	stop = func() {
		ln.Close()
		mu.Lock()
		defer mu.Unlock()
		stopped = true
		for _, c := range conns {
			c.Close()
		}
	}
	t.Cleanup(stop)
	return ln.Addr().String(), stop
}

// TestSQLiteBeginImmediate: a read-write transaction of the store holds
// SQLite's write lock from its BEGIN (another connection cannot take it),
// a read-only one does not (a reader never holds up the writer).
func TestSQLiteBeginImmediate(t *testing.T) {
	path := filepath.Join(t.TempDir(), "s.db")
	s, err := OpenSQLite(path, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	other, err := sql.Open("sqlite", "file:"+path+"?_pragma=busy_timeout(0)")
	if err != nil {
		t.Fatal(err)
	}
	defer other.Close()
	ctx := context.Background()
	for _, tc := range []struct {
		name   string
		opts   *sql.TxOptions
		locked bool
	}{{"read-write", nil, true}, {"read-only", &sql.TxOptions{ReadOnly: true}, false}} {
		tx, err := s.db.BeginTx(ctx, tc.opts)
		if err != nil {
			t.Fatal(err)
		}
		_, err = other.Exec(`BEGIN IMMEDIATE; ROLLBACK`)
		if kind, _ := UnavailableKind(err); (kind == "store-busy") != tc.locked {
			t.Errorf("%s: another writer's BEGIN IMMEDIATE gave %v; want it locked out: %v", tc.name, err, tc.locked)
		}
		tx.Rollback()
	}
}

// TestSQLiteFeedbackUnderCheckpoints: feedback reads card_log then
// writes; while WAL restarts (a checkpoint every millisecond, restarting
// past one page), a reader and another writer run beside it, no feedback
// call fails with "database is locked".
func TestSQLiteFeedbackUnderCheckpoints(t *testing.T) {
	path := filepath.Join(t.TempDir(), "s.db")
	s, err := OpenSQLite(path, Options{CheckpointEvery: time.Millisecond, WALRestartFrames: 1})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	ctx := context.Background()
	const n = 400
	for i := 0; i < n; i += 100 {
		cards := make([]CardRecord, 100)
		for k := range cards {
			cards[k] = card(fmt.Sprint("c", i+k), t0)
		}
		if err := s.LogCards(ctx, cards); err != nil {
			t.Fatal(err)
		}
	}
	// Another writer (an operator's shell, another process) on its own
	// connection, writing in short transactions.
	other, err := sql.Open("sqlite", "file:"+path+"?_pragma=busy_timeout(5000)")
	if err != nil {
		t.Fatal(err)
	}
	defer other.Close()
	other.SetMaxOpenConns(1)
	stop := make(chan struct{})
	var wg sync.WaitGroup
	side := make(chan error, 2)
	wg.Add(2)
	go func() { // the reader
		defer wg.Done()
		for {
			select {
			case <-stop:
				return
			default:
			}
			if _, _, err := s.Counts(ctx); err != nil {
				side <- fmt.Errorf("reader: %w", err)
				return
			}
		}
	}()
	go func() { // the other writer
		defer wg.Done()
		for i := 0; ; i++ {
			select {
			case <-stop:
				return
			default:
			}
			if _, err := other.Exec(`INSERT INTO jwt_replay (iss, jti, until) VALUES ('other', ?, '2000-01-01')`, strconv.Itoa(i)); err != nil {
				side <- fmt.Errorf("other writer: %w", err)
				return
			}
		}
	}()
	var failed atomic.Int64
	var feedbackWG sync.WaitGroup
	for w := range 4 {
		feedbackWG.Add(1)
		go func() {
			defer feedbackWG.Done()
			for i := w; i < n; i += 4 {
				err := s.RecordFeedback(ctx, []FeedbackRecord{{Card: fmt.Sprint("c", i), Service: "sodium-infusion-check", Outcome: Overridden, OutcomeAt: t0}})
				if err != nil && failed.Add(1) <= 5 {
					t.Errorf("feedback %d: %v", i, err)
				}
			}
		}()
	}
	feedbackWG.Wait()
	close(stop)
	wg.Wait()
	close(side)
	for err := range side {
		t.Error(err)
	}
	if f := failed.Load(); f > 0 {
		t.Errorf("%d of %d feedback calls failed", f, n)
	}
}

// TestSQLiteRestartBetweenCommits: with no reader, a WAL restart always
// finishes even while the writer commits back to back: it waits for the
// writer's turn instead of racing it for the write lock (and, losing,
// backing off for seconds while the WAL grows).
func TestSQLiteRestartBetweenCommits(t *testing.T) {
	path := filepath.Join(t.TempDir(), "s.db")
	s, err := OpenSQLite(path, Options{CheckpointEvery: time.Hour, WALRestartFrames: 8})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	ctx := context.Background()
	conn, err := s.db.Conn(ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	if _, err := conn.ExecContext(ctx, `PRAGMA busy_timeout = `+strconv.FormatInt(restartWait.Milliseconds(), 10)); err != nil {
		t.Fatal(err)
	}
	// Four callers keep the writer committing back to back, 10 cards a
	// call.
	var logged atomic.Int64
	stop := make(chan struct{})
	var writers sync.WaitGroup
	writerErrs := make(chan error, 4)
	for w := range 4 {
		writers.Add(1)
		go func() {
			defer writers.Done()
			for i := 0; ; i++ {
				select {
				case <-stop:
					return
				default:
				}
				cards := make([]CardRecord, 10)
				for k := range cards {
					cards[k] = card(fmt.Sprint("w", w, "-", i, "-", k), t0)
				}
				if err := s.LogCards(ctx, cards); err != nil {
					writerErrs <- err
					return
				}
				logged.Add(1)
			}
		}()
	}
	const restarts = 100
	blocked := 0
	for range restarts {
		for next := logged.Load() + 1; logged.Load() < next; {
			time.Sleep(time.Millisecond)
		}
		b, err := s.checkpoint(conn, true)
		if err != nil {
			t.Fatal(err)
		}
		if b {
			blocked++
		}
	}
	close(stop)
	writers.Wait()
	close(writerErrs)
	for err := range writerErrs {
		t.Fatal(err)
	}
	if blocked > 0 {
		t.Errorf("%d of %d WAL restarts were kept from finishing with no reader", blocked, restarts)
	}
}

// TestMigrateConcurrentProcesses: replicas starting together on an empty
// database all migrate it, each migration applied and recorded once. Five
// processes (this test binary, running TestHelperProcessMigrate) open the
// store at the same instant, five times, each time on a fresh database.
func TestMigrateConcurrentProcesses(t *testing.T) {
	if testing.Short() {
		t.Skip("starts processes")
	}
	// fresh returns an empty database as the store names it, and a
	// connection to it.
	type fresh func(t *testing.T) (store string, db *sql.DB)
	cases := []struct {
		name  string
		fresh fresh
	}{{"sqlite", func(t *testing.T) (string, *sql.DB) {
		path := filepath.Join(t.TempDir(), "halite.db")
		db, err := sql.Open("sqlite", "file:"+path+"?_pragma=busy_timeout(5000)")
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { db.Close() })
		return "sqlite:" + path, db
	}}}
	if dsn := os.Getenv("HALITE_TEST_POSTGRES_DSN"); dsn != "" {
		cases = append(cases, struct {
			name  string
			fresh fresh
		}{"postgres", func(t *testing.T) (string, *sql.DB) {
			store := freshDatabase(t, dsn)
			db, err := sql.Open("pgx", store)
			if err != nil {
				t.Fatal(err)
			}
			t.Cleanup(func() { db.Close() })
			return store, db
		}})
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			names, err := fs.Glob(migrations, "migrations/"+tc.name+"/*.sql")
			if err != nil {
				t.Fatal(err)
			}
			var want []string
			for _, n := range names {
				want = append(want, strings.TrimSuffix(filepath.Base(n), ".sql"))
			}
			for round := range 5 {
				store, db := tc.fresh(t)
				// Each process says it is ready, then waits for its stdin
				// to close: all are released at once.
				const procs = 5
				cmds := make([]*exec.Cmd, procs)
				starts := make([]io.WriteCloser, procs)
				stdouts, stderrs := make([]bytes.Buffer, procs), make([]bytes.Buffer, procs)
				ready, read := make([]chan error, procs), make([]chan struct{}, procs)
				for i := range cmds {
					cmds[i] = exec.Command(os.Args[0], "-test.run=^TestHelperProcessMigrate$", "-test.count=1")
					// atexit_sleep_ms: a -race binary would idle a second at exit.
					cmds[i].Env = append(os.Environ(), "HALITE_TEST_MIGRATE_STORE="+store, "GORACE="+os.Getenv("GORACE")+" atexit_sleep_ms=0")
					cmds[i].Stderr = &stderrs[i]
					var err error
					if starts[i], err = cmds[i].StdinPipe(); err != nil {
						t.Fatal(err)
					}
					stdout, err := cmds[i].StdoutPipe()
					if err != nil {
						t.Fatal(err)
					}
					if err := cmds[i].Start(); err != nil {
						t.Fatal(err)
					}
					ready[i] = make(chan error, 1)
					read[i] = make(chan struct{})
					go func() {
						defer close(read[i])
						r := bufio.NewReader(stdout)
						if line, err := r.ReadString('\n'); line != "ready\n" {
							ready[i] <- fmt.Errorf("%q instead of ready: %v", line, err)
							return
						}
						ready[i] <- nil
						io.Copy(&stdouts[i], r)
					}()
				}
				for i := range cmds {
					if err := <-ready[i]; err != nil {
						t.Fatalf("round %d, process %d: %v", round, i, err)
					}
				}
				for _, w := range starts {
					w.Close()
				}
				for i, c := range cmds {
					<-read[i] // before Wait, which closes the pipe
					if err := c.Wait(); err != nil {
						t.Errorf("round %d, process %d: %v\n%s%s", round, i, err, &stdouts[i], &stderrs[i])
					}
				}
				rows, err := db.Query(`SELECT version, count(*) FROM schema_migrations GROUP BY version ORDER BY version`)
				if err != nil {
					t.Fatalf("round %d: %v", round, err)
				}
				var got []string
				for rows.Next() {
					var v string
					var n int
					if err := rows.Scan(&v, &n); err != nil {
						t.Fatal(err)
					}
					if n != 1 {
						t.Errorf("round %d: migration %s recorded %d times", round, v, n)
					}
					got = append(got, v)
				}
				if err := rows.Err(); err != nil {
					t.Fatal(err)
				}
				rows.Close()
				if !slices.Equal(got, want) {
					t.Errorf("round %d: migrations recorded %v; want %v", round, got, want)
				}
				if t.Failed() {
					return
				}
			}
		})
	}
}

// TestHelperProcessMigrate is a process of TestMigrateConcurrentProcesses:
// it prints "ready", waits for its stdin to close, opens the store
// HALITE_TEST_MIGRATE_STORE names ("sqlite:PATH" or a postgres:// URL) and
// closes it. Run directly, it skips.
func TestHelperProcessMigrate(t *testing.T) {
	store := os.Getenv("HALITE_TEST_MIGRATE_STORE")
	if store == "" {
		t.Skip("a process of TestMigrateConcurrentProcesses")
	}
	fmt.Println("ready")
	if _, err := io.Copy(io.Discard, os.Stdin); err != nil {
		t.Fatal(err)
	}
	var s *DB
	var err error
	if path, ok := strings.CutPrefix(store, "sqlite:"); ok {
		s, err = OpenSQLite(path, Options{})
	} else {
		s, err = OpenPostgres(store, Options{})
	}
	if err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
}

// freshDatabase creates an empty database on the server of dsn, dropped
// after the test, and returns a DSN that uses it.
func freshDatabase(t *testing.T, dsn string) string {
	t.Helper()
	db, err := sql.Open("pgx", dsn)
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	name := fmt.Sprintf("halite_test_%016x", rand.Uint64())
	if _, err := db.Exec("CREATE DATABASE " + name); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		if db, err := sql.Open("pgx", dsn); err == nil {
			db.Exec("DROP DATABASE IF EXISTS " + name + " WITH (FORCE)")
			db.Close()
		}
	})
	u, err := url.Parse(dsn)
	if err != nil {
		t.Fatal(err)
	}
	u.Path = "/" + name
	return u.String()
}
