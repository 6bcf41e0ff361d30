//! The schema and its migrations (documented in `host/SCHEMA.md`).
//!
//! `PRAGMA user_version` holds the number of migrations applied. Each
//! migration runs in its own transaction; a database with a higher version
//! than this build knows is refused (never downgraded).

/// Migrations in order; migration `i` takes the schema from version `i` to `i + 1`.
pub const MIGRATIONS: &[&str] = &[MIGRATION_1, MIGRATION_2];

/// The schema version this build writes.
pub const SCHEMA_VERSION: u32 = MIGRATIONS.len() as u32;

const MIGRATION_1: &str = r#"
CREATE TABLE chain_head (
    id       INTEGER PRIMARY KEY CHECK (id = 1),
    position INTEGER NOT NULL,
    hash     BLOB    NOT NULL CHECK (length(hash) = 32)
);
INSERT INTO chain_head (id, position, hash) VALUES (1, 0, zeroblob(32));

CREATE TABLE devices (
    id                 INTEGER PRIMARY KEY,
    serial             TEXT    NOT NULL UNIQUE,
    first_seen_unix_ms INTEGER NOT NULL,
    firmware           TEXT,
    protocol           TEXT,
    freq_low_hz        REAL,
    freq_high_hz       REAL,
    position           INTEGER NOT NULL UNIQUE,
    hash               BLOB    NOT NULL
);

CREATE TABLE readings (
    position        INTEGER PRIMARY KEY,
    device          INTEGER NOT NULL REFERENCES devices(id),
    boot            INTEGER NOT NULL,
    counter         INTEGER NOT NULL,
    time_ms         INTEGER NOT NULL,
    channels        BLOB    NOT NULL CHECK (length(channels) = 32),
    temperature_c   REAL,
    moisture_pct    REAL,
    uncertainty_pct REAL,
    flags           INTEGER NOT NULL,
    cell_cal        INTEGER NOT NULL,
    product_cal     INTEGER NOT NULL,
    source          INTEGER NOT NULL,
    hash            BLOB    NOT NULL
);
CREATE UNIQUE INDEX readings_key ON readings (device, boot, counter);

CREATE TABLE events (
    position INTEGER PRIMARY KEY,
    device   INTEGER NOT NULL REFERENCES devices(id),
    number   INTEGER NOT NULL,
    boot     INTEGER NOT NULL,
    time_ms  INTEGER NOT NULL,
    kind     TEXT    NOT NULL,
    detail   TEXT    NOT NULL,
    hash     BLOB    NOT NULL
);
CREATE UNIQUE INDEX events_key ON events (device, number);

CREATE TABLE calibrations (
    position        INTEGER PRIMARY KEY,
    device          INTEGER NOT NULL REFERENCES devices(id),
    seq             INTEGER NOT NULL,
    kind            TEXT    NOT NULL,
    cal_id          INTEGER NOT NULL,
    slot            INTEGER,
    name            TEXT,
    body            TEXT    NOT NULL,
    note            TEXT,
    supersedes      INTEGER,
    created_unix_ms INTEGER NOT NULL,
    hash            BLOB    NOT NULL
);
CREATE UNIQUE INDEX calibrations_key ON calibrations (device, seq);

CREATE TABLE lab_samples (
    position         INTEGER PRIMARY KEY,
    device           INTEGER NOT NULL REFERENCES devices(id),
    seq              INTEGER NOT NULL,
    sample_id        TEXT    NOT NULL,
    taken_unix_ms    INTEGER NOT NULL,
    product          TEXT,
    lab_moisture_pct REAL    NOT NULL,
    basis            TEXT    NOT NULL,
    method           TEXT,
    reading_boot     INTEGER,
    reading_counter  INTEGER,
    note             TEXT,
    supersedes       INTEGER,
    created_unix_ms  INTEGER NOT NULL,
    hash             BLOB    NOT NULL
);
CREATE UNIQUE INDEX lab_samples_key ON lab_samples (device, seq);
CREATE INDEX lab_samples_sample_id ON lab_samples (device, sample_id);

CREATE TRIGGER devices_no_update BEFORE UPDATE ON devices
BEGIN SELECT RAISE(ABORT, 'fringe store: devices are append-only'); END;
CREATE TRIGGER devices_no_delete BEFORE DELETE ON devices
BEGIN SELECT RAISE(ABORT, 'fringe store: devices are append-only'); END;
CREATE TRIGGER readings_no_update BEFORE UPDATE ON readings
BEGIN SELECT RAISE(ABORT, 'fringe store: readings are append-only'); END;
CREATE TRIGGER readings_no_delete BEFORE DELETE ON readings
BEGIN SELECT RAISE(ABORT, 'fringe store: readings are append-only'); END;
CREATE TRIGGER events_no_update BEFORE UPDATE ON events
BEGIN SELECT RAISE(ABORT, 'fringe store: events are append-only'); END;
CREATE TRIGGER events_no_delete BEFORE DELETE ON events
BEGIN SELECT RAISE(ABORT, 'fringe store: events are append-only'); END;
CREATE TRIGGER calibrations_no_update BEFORE UPDATE ON calibrations
BEGIN SELECT RAISE(ABORT, 'fringe store: calibrations are append-only; record a correction that supersedes the old one'); END;
CREATE TRIGGER calibrations_no_delete BEFORE DELETE ON calibrations
BEGIN SELECT RAISE(ABORT, 'fringe store: calibrations are append-only; record a correction that supersedes the old one'); END;
CREATE TRIGGER lab_samples_no_update BEFORE UPDATE ON lab_samples
BEGIN SELECT RAISE(ABORT, 'fringe store: lab samples are append-only; record a correction that supersedes the old one'); END;
CREATE TRIGGER lab_samples_no_delete BEFORE DELETE ON lab_samples
BEGIN SELECT RAISE(ABORT, 'fringe store: lab samples are append-only; record a correction that supersedes the old one'); END;
CREATE TRIGGER chain_head_no_delete BEFORE DELETE ON chain_head
BEGIN SELECT RAISE(ABORT, 'fringe store: the chain head cannot be removed'); END;
CREATE TRIGGER chain_head_forward_only BEFORE UPDATE ON chain_head
WHEN NEW.position < OLD.position
BEGIN SELECT RAISE(ABORT, 'fringe store: the chain head only moves forward'); END;
"#;

/// Migration 2: internal reference checks, chained like every other record
/// (the drift monitor of the reference check reads them).
const MIGRATION_2: &str = r#"
CREATE TABLE reference_checks (
    position        INTEGER PRIMARY KEY,
    device          INTEGER NOT NULL REFERENCES devices(id),
    seq             INTEGER NOT NULL,
    time_ms         INTEGER NOT NULL,
    ratio_low       REAL    NOT NULL,
    ratio_high      REAL    NOT NULL,
    baseline        REAL    NOT NULL,
    ok              INTEGER NOT NULL,
    created_unix_ms INTEGER NOT NULL,
    hash            BLOB    NOT NULL
);
CREATE UNIQUE INDEX reference_checks_key ON reference_checks (device, seq);
CREATE INDEX reference_checks_time ON reference_checks (device, time_ms);
CREATE TRIGGER reference_checks_no_update BEFORE UPDATE ON reference_checks
BEGIN SELECT RAISE(ABORT, 'fringe store: reference checks are append-only'); END;
CREATE TRIGGER reference_checks_no_delete BEFORE DELETE ON reference_checks
BEGIN SELECT RAISE(ABORT, 'fringe store: reference checks are append-only'); END;
"#;
