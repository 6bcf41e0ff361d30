//! The schema, its migrations and the column types of every hashed column
//! (summarised in the crate docs).
//!
//! `fringe_schema` holds one row per migration applied (its number, when,
//! and what it did). Each migration runs in its own transaction under an
//! advisory lock, so gateways starting together migrate once; a database
//! with a higher version than this build knows is refused, never
//! downgraded.

use fringe_store::chain::Table;
use postgres::types::Type;

/// Migrations in order; migration `i` takes the schema from version `i` to
/// `i + 1`. Each is `(what it does, SQL)`.
pub const MIGRATIONS: &[(&str, &str)] = &[(
    "tables, triggers and device leases of fringe's PostgreSQL store",
    MIGRATION_1,
)];

/// The schema version this build writes.
pub const SCHEMA_VERSION: u32 = MIGRATIONS.len() as u32;

/// Key of the transaction-level advisory lock that serialises migrations.
pub(crate) const MIGRATION_LOCK: i64 = 0x6672_696e_6765_0001;

/// Key of the transaction-level advisory lock that serialises the creation
/// of reading partitions.
pub(crate) const PARTITION_LOCK: i64 = 0x6672_696e_6765_0002;

/// Migration 1. Column types: SQLite's INTEGER is `bigint` (but `flags`,
/// a u16, is `integer` and `source`, 0 or 1, is `smallint`), REAL is
/// `double precision`, TEXT is `text`, BLOB is `bytea`; [`column_types`]
/// lists them and the row codec maps each to the store's `Value` and back
/// without loss.
const MIGRATION_1: &str = r#"
CREATE TABLE fringe_schema (
    version    integer     PRIMARY KEY,
    applied_at timestamptz NOT NULL DEFAULT now(),
    what       text        NOT NULL
);

CREATE FUNCTION fringe_refuse() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    RAISE EXCEPTION '%', TG_ARGV[0];
END
$$;

CREATE FUNCTION fringe_head_forward() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    IF NEW.id <> OLD.id OR NEW.position <= OLD.position THEN
        RAISE EXCEPTION 'fringe store: the chain head only moves forward';
    END IF;
    RETURN NEW;
END
$$;

CREATE TABLE chain_head (
    id       integer PRIMARY KEY CHECK (id = 1),
    position bigint  NOT NULL,
    hash     bytea   NOT NULL CHECK (length(hash) = 32)
);
INSERT INTO chain_head (id, position, hash) VALUES (1, 0, decode(repeat('00', 32), 'hex'));
CREATE TRIGGER chain_head_forward_only BEFORE UPDATE ON chain_head
    FOR EACH ROW EXECUTE FUNCTION fringe_head_forward();
CREATE TRIGGER chain_head_no_delete BEFORE DELETE ON chain_head
    FOR EACH ROW EXECUTE FUNCTION fringe_refuse('fringe store: the chain head cannot be removed');
CREATE TRIGGER chain_head_no_truncate BEFORE TRUNCATE ON chain_head
    FOR EACH STATEMENT EXECUTE FUNCTION fringe_refuse('fringe store: the chain head cannot be removed');

CREATE TABLE devices (
    id                 integer GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    serial             text    NOT NULL UNIQUE,
    first_seen_unix_ms bigint  NOT NULL,
    firmware           text,
    protocol           text,
    freq_low_hz        double precision,
    freq_high_hz       double precision,
    position           bigint  NOT NULL UNIQUE,
    hash               bytea   NOT NULL CHECK (length(hash) = 32)
);

-- Readings are partitioned by device time (time_ms, ms since the Unix
-- epoch): one partition per UTC month, created on demand, one for times
-- since boot (below 2000-01-01, flag clock_unset) and one from the year
-- 10000 on. A unique index of a partitioned table must contain the
-- partition key, so the key (device, boot, counter) is unique per partition
-- by the index and across partitions by the writer, which looks it up under
-- the chain lock.
CREATE TABLE readings (
    position        bigint           NOT NULL,
    time_ms         bigint           NOT NULL,
    boot            bigint           NOT NULL,
    counter         bigint           NOT NULL,
    cell_cal        bigint           NOT NULL,
    product_cal     bigint           NOT NULL,
    temperature_c   double precision,
    moisture_pct    double precision,
    uncertainty_pct double precision,
    device          integer          NOT NULL,
    flags           integer          NOT NULL,
    source          smallint         NOT NULL,
    channels        bytea            NOT NULL CHECK (length(channels) = 32),
    hash            bytea            NOT NULL CHECK (length(hash) = 32)
) PARTITION BY RANGE (time_ms);
CREATE INDEX readings_position ON readings (position);
CREATE UNIQUE INDEX readings_key ON readings (device, boot, counter, time_ms);

CREATE TABLE events (
    position bigint  PRIMARY KEY,
    device   integer NOT NULL REFERENCES devices (id),
    number   bigint  NOT NULL,
    boot     bigint  NOT NULL,
    time_ms  bigint  NOT NULL,
    kind     text    NOT NULL,
    detail   text    NOT NULL,
    hash     bytea   NOT NULL CHECK (length(hash) = 32),
    UNIQUE (device, number)
);

CREATE TABLE calibrations (
    position        bigint  PRIMARY KEY,
    device          integer NOT NULL REFERENCES devices (id),
    seq             bigint  NOT NULL,
    kind            text    NOT NULL,
    cal_id          bigint  NOT NULL,
    slot            bigint,
    name            text,
    body            text    NOT NULL,
    note            text,
    supersedes      bigint,
    created_unix_ms bigint  NOT NULL,
    hash            bytea   NOT NULL CHECK (length(hash) = 32),
    UNIQUE (device, seq)
);
CREATE INDEX calibrations_cal_id ON calibrations (device, cal_id);

CREATE TABLE lab_samples (
    position         bigint  PRIMARY KEY,
    device           integer NOT NULL REFERENCES devices (id),
    seq              bigint  NOT NULL,
    sample_id        text    NOT NULL,
    taken_unix_ms    bigint  NOT NULL,
    product          text,
    lab_moisture_pct double precision NOT NULL,
    basis            text    NOT NULL,
    method           text,
    reading_boot     bigint,
    reading_counter  bigint,
    note             text,
    supersedes       bigint,
    created_unix_ms  bigint  NOT NULL,
    hash             bytea   NOT NULL CHECK (length(hash) = 32),
    UNIQUE (device, seq)
);
CREATE INDEX lab_samples_sample_id ON lab_samples (device, sample_id);

CREATE TABLE reference_checks (
    position        bigint  PRIMARY KEY,
    device          integer NOT NULL REFERENCES devices (id),
    seq             bigint  NOT NULL,
    time_ms         bigint  NOT NULL,
    ratio_low       double precision NOT NULL,
    ratio_high      double precision NOT NULL,
    baseline        double precision NOT NULL,
    ok              bigint  NOT NULL,
    created_unix_ms bigint  NOT NULL,
    hash            bytea   NOT NULL CHECK (length(hash) = 32),
    UNIQUE (device, seq)
);
CREATE INDEX reference_checks_time ON reference_checks (device, time_ms);

CREATE TRIGGER devices_no_change BEFORE UPDATE OR DELETE ON devices
    FOR EACH ROW EXECUTE FUNCTION fringe_refuse('fringe store: devices are append-only');
CREATE TRIGGER devices_no_truncate BEFORE TRUNCATE ON devices
    FOR EACH STATEMENT EXECUTE FUNCTION fringe_refuse('fringe store: devices are append-only');
-- Row triggers of a partitioned table are cloned to every partition; the
-- TRUNCATE trigger is not and is added to each partition when it is made.
CREATE TRIGGER readings_no_change BEFORE UPDATE OR DELETE ON readings
    FOR EACH ROW EXECUTE FUNCTION fringe_refuse('fringe store: readings are append-only');
CREATE TRIGGER readings_no_truncate BEFORE TRUNCATE ON readings
    FOR EACH STATEMENT EXECUTE FUNCTION fringe_refuse('fringe store: readings are append-only');
CREATE TRIGGER events_no_change BEFORE UPDATE OR DELETE ON events
    FOR EACH ROW EXECUTE FUNCTION fringe_refuse('fringe store: events are append-only');
CREATE TRIGGER events_no_truncate BEFORE TRUNCATE ON events
    FOR EACH STATEMENT EXECUTE FUNCTION fringe_refuse('fringe store: events are append-only');
CREATE TRIGGER calibrations_no_change BEFORE UPDATE OR DELETE ON calibrations
    FOR EACH ROW EXECUTE FUNCTION fringe_refuse('fringe store: calibrations are append-only; record a correction that supersedes the old one');
CREATE TRIGGER calibrations_no_truncate BEFORE TRUNCATE ON calibrations
    FOR EACH STATEMENT EXECUTE FUNCTION fringe_refuse('fringe store: calibrations are append-only; record a correction that supersedes the old one');
CREATE TRIGGER lab_samples_no_change BEFORE UPDATE OR DELETE ON lab_samples
    FOR EACH ROW EXECUTE FUNCTION fringe_refuse('fringe store: lab samples are append-only; record a correction that supersedes the old one');
CREATE TRIGGER lab_samples_no_truncate BEFORE TRUNCATE ON lab_samples
    FOR EACH STATEMENT EXECUTE FUNCTION fringe_refuse('fringe store: lab samples are append-only; record a correction that supersedes the old one');
CREATE TRIGGER reference_checks_no_change BEFORE UPDATE OR DELETE ON reference_checks
    FOR EACH ROW EXECUTE FUNCTION fringe_refuse('fringe store: reference checks are append-only');
CREATE TRIGGER reference_checks_no_truncate BEFORE TRUNCATE ON reference_checks
    FOR EACH STATEMENT EXECUTE FUNCTION fringe_refuse('fringe store: reference checks are append-only');

-- Which gateway owns which device (not chained, not append-only: it is
-- coordination, not a record). Expiry is on the server's clock. A release
-- sets expires_at to now() and keeps the row, so the token only grows.
CREATE TABLE device_leases (
    serial      text        PRIMARY KEY,
    owner       text        NOT NULL,
    token       bigint      NOT NULL,
    acquired_at timestamptz NOT NULL,
    renewed_at  timestamptz NOT NULL,
    expires_at  timestamptz NOT NULL
);
"#;

/// The PostgreSQL type of each hashed column of `table` but the serial
/// (that is, of `table.columns()[1..]`), in that order.
pub fn column_types(table: Table) -> &'static [Type] {
    const I8: Type = Type::INT8;
    const F8: Type = Type::FLOAT8;
    const TX: Type = Type::TEXT;
    const BY: Type = Type::BYTEA;
    match table {
        Table::Devices => &[I8, TX, TX, F8, F8],
        Table::Readings => &[I8, I8, I8, BY, F8, F8, F8, Type::INT4, I8, I8, Type::INT2],
        Table::Events => &[I8, I8, I8, TX, TX],
        Table::Calibrations => &[I8, TX, I8, I8, TX, TX, TX, I8, I8],
        Table::LabSamples => &[I8, TX, I8, TX, F8, TX, TX, I8, I8, TX, I8, I8],
        Table::ReferenceChecks => &[I8, I8, F8, F8, F8, I8, I8],
    }
}

/// The chained tables' columns that are stored per device in every table
/// but `devices`: the table's hashed columns without the serial.
pub fn stored_columns(table: Table) -> &'static [&'static str] {
    &table.columns()[1..]
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Consistency test: every hashed column has a type, and every column
    /// named in `Table::columns` is in the migration's SQL.
    #[test]
    fn every_hashed_column_has_a_type_and_a_column() {
        for t in Table::ALL {
            assert_eq!(
                column_types(t).len(),
                stored_columns(t).len(),
                "{t}: {:?}",
                stored_columns(t)
            );
            for c in t.columns() {
                assert!(
                    MIGRATION_1.contains(&format!("    {c} ")),
                    "{t}.{c} missing from the schema"
                );
            }
        }
    }
}
