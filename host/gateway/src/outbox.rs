//! The store-and-forward buffer of the MQTT publisher: a SQLite file that
//! holds every message to publish until the broker has acknowledged it.
//!
//! Rows are taken in insertion order and deleted only after their PUBACK
//! (QoS 1), so a broker that is away, a network that is down or a gateway
//! that is killed loses nothing: the next session sends what is left, in
//! order. A message whose acknowledgement was lost on the way back is sent
//! again (MQTT's QoS 1 is "at least once"); the reading's `boot` and
//! `counter` metrics identify such a repeat.

use std::path::Path;

use rusqlite::{params, Connection, OptionalExtension};

/// What a buffered row asks the publisher to send.
#[derive(Debug, Clone, PartialEq)]
pub enum Item {
    /// A reading of a device (JSON of `fringe_protocol::Reading`).
    Reading {
        /// Device serial.
        device: String,
        /// The reading as JSON.
        json: String,
    },
    /// A drift alarm of a device, in words.
    Alarm {
        /// Device serial.
        device: String,
        /// The alarm's text.
        text: String,
        /// When it was raised, ms since the Unix epoch.
        time_ms: u64,
    },
    /// The device's link was lost (DDEATH).
    DeviceLost {
        /// Device serial.
        device: String,
    },
}

/// A buffered row.
#[derive(Debug, Clone, PartialEq)]
pub struct Row {
    /// Row id (insertion order).
    pub id: i64,
    /// When it was buffered, ms since the Unix epoch.
    pub queued_ms: u64,
    /// What to send.
    pub item: Item,
}

/// Errors of the buffer (SQLite's, with what was being done; shared by
/// every reading of a transaction that failed).
#[derive(Debug, Clone, thiserror::Error)]
#[error("MQTT buffer {what}: {source}")]
pub struct OutboxError {
    what: &'static str,
    #[source]
    source: std::sync::Arc<rusqlite::Error>,
}

impl OutboxError {
    /// A failure of the buffer's own code (not SQLite's), in words.
    pub fn internal(why: &str) -> Self {
        OutboxError {
            what: "write",
            source: std::sync::Arc::new(rusqlite::Error::SqliteFailure(
                rusqlite::ffi::Error::new(rusqlite::ffi::SQLITE_INTERNAL),
                Some(why.to_string()),
            )),
        }
    }
}

fn err(what: &'static str) -> impl FnOnce(rusqlite::Error) -> OutboxError {
    move |source| OutboxError {
        what,
        source: std::sync::Arc::new(source),
    }
}

/// The buffer file.
#[derive(Debug)]
pub struct Outbox {
    db: Connection,
    max_rows: i64,
}

/// Rows the buffer keeps at most by default: about 23 days of one device
/// reading every second, about 800 MB at 400 bytes a row. Past it the
/// oldest rows are dropped (the store keeps every reading): a broker away
/// for good filled the disk beside the store, and the store's commits,
/// and with them Modbus, failed (found by review).
pub const DEFAULT_MAX_ROWS: i64 = 2_000_000;

const SCHEMA: &str = "
PRAGMA journal_mode = WAL;
PRAGMA synchronous = FULL;
CREATE TABLE IF NOT EXISTS outbox (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    queued_ms INTEGER NOT NULL,
    kind INTEGER NOT NULL,
    device TEXT NOT NULL,
    body TEXT NOT NULL,
    time_ms INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value INTEGER NOT NULL);
";

impl Outbox {
    /// Opens (or creates) the buffer at `path`.
    ///
    /// # Errors
    /// When the file cannot be opened or is not a buffer of this format.
    pub fn open(path: &Path) -> Result<Self, OutboxError> {
        Self::open_with_limit(path, DEFAULT_MAX_ROWS)
    }

    /// [`Outbox::open`] keeping at most about `max_rows` rows.
    ///
    /// # Errors
    /// As [`Outbox::open`].
    pub fn open_with_limit(path: &Path, max_rows: i64) -> Result<Self, OutboxError> {
        let db = Connection::open(path).map_err(err("open"))?;
        db.execute_batch(SCHEMA).map_err(err("create"))?;
        Ok(Self {
            db,
            max_rows: max_rows.max(1),
        })
    }

    /// Appends `items` (each with when it was buffered) in one
    /// transaction, in order; returns how many of the oldest rows were
    /// dropped to keep the buffer within its limit (checked when an id
    /// that is a multiple of 1,000 is among them: the rows from the
    /// limit below it on are kept).
    ///
    /// # Errors
    /// When the rows cannot be written (then none is).
    pub fn push_many(&self, items: &[(Item, u64)]) -> Result<u64, OutboxError> {
        let tx = self.db.unchecked_transaction().map_err(err("append"))?;
        let mut trim_at = None;
        for (item, now_ms) in items {
            let id = self.push(item, *now_ms)?;
            if id % 1000 == 0 {
                trim_at = Some(id);
            }
        }
        let dropped = match trim_at {
            Some(id) => self
                .db
                .execute(
                    "DELETE FROM outbox WHERE id <= ?1",
                    params![id - self.max_rows],
                )
                .map_err(err("trim"))? as u64,
            None => 0,
        };
        tx.commit().map_err(err("append"))?;
        Ok(dropped)
    }

    /// Appends `item`, buffered at `now_ms`.
    ///
    /// # Errors
    /// When the row cannot be written (disk full, read-only).
    pub fn push(&self, item: &Item, now_ms: u64) -> Result<i64, OutboxError> {
        let (kind, device, body, time_ms) = match item {
            Item::Reading { device, json } => (1, device, json.as_str(), 0u64),
            Item::Alarm {
                device,
                text,
                time_ms,
            } => (2, device, text.as_str(), *time_ms),
            Item::DeviceLost { device } => (3, device, "", 0),
        };
        self.db
            .execute(
                "INSERT INTO outbox (queued_ms, kind, device, body, time_ms) VALUES (?1, ?2, ?3, ?4, ?5)",
                params![now_ms as i64, kind, device, body, time_ms as i64],
            )
            .map_err(err("append"))?;
        Ok(self.db.last_insert_rowid())
    }

    /// Up to `n` rows after id `after`, oldest first.
    ///
    /// # Errors
    /// When the file cannot be read.
    pub fn next(&self, after: i64, n: usize) -> Result<Vec<Row>, OutboxError> {
        let mut st = self
            .db
            .prepare_cached(
                "SELECT id, queued_ms, kind, device, body, time_ms FROM outbox WHERE id > ?1 ORDER BY id LIMIT ?2",
            )
            .map_err(err("read"))?;
        let rows = st
            .query_map(params![after, n as i64], |r| {
                let kind: i64 = r.get(2)?;
                let device: String = r.get(3)?;
                let body: String = r.get(4)?;
                let item = match kind {
                    1 => Item::Reading { device, json: body },
                    2 => Item::Alarm {
                        device,
                        text: body,
                        time_ms: r.get::<_, i64>(5)? as u64,
                    },
                    _ => Item::DeviceLost { device },
                };
                Ok(Row {
                    id: r.get(0)?,
                    queued_ms: r.get::<_, i64>(1)? as u64,
                    item,
                })
            })
            .map_err(err("read"))?;
        rows.collect::<Result<_, _>>().map_err(err("read"))
    }

    /// Removes rows `ids` (acknowledged by the broker) in one
    /// transaction: one write to the disk for them all, where one each
    /// made the disk's flush rate the rate at which a backlog could be
    /// sent.
    ///
    /// # Errors
    /// When the file cannot be written (then none is removed).
    pub fn done_many(&self, ids: &[i64]) -> Result<(), OutboxError> {
        let tx = self.db.unchecked_transaction().map_err(err("delete"))?;
        {
            let mut st = tx
                .prepare_cached("DELETE FROM outbox WHERE id = ?1")
                .map_err(err("delete"))?;
            for id in ids {
                st.execute(params![id]).map_err(err("delete"))?;
            }
        }
        tx.commit().map_err(err("delete"))
    }

    /// Rows waiting.
    ///
    /// # Errors
    /// When the file cannot be read.
    pub fn len(&self) -> Result<u64, OutboxError> {
        self.db
            .query_row("SELECT count(*) FROM outbox", [], |r| r.get::<_, i64>(0))
            .map(|n| n as u64)
            .map_err(err("count"))
    }

    /// Whether nothing waits.
    ///
    /// # Errors
    /// When the file cannot be read.
    pub fn is_empty(&self) -> Result<bool, OutboxError> {
        Ok(self.len()? == 0)
    }

    /// Keeps `bd_seq`, the birth/death sequence number (0-255) of the
    /// session the publisher starts, in the file as the last one used, so
    /// that the next run counts on from it (the number itself is chosen by
    /// the publisher: `mqtt::bd_seq_after`).
    ///
    /// # Errors
    /// When the file cannot be written.
    pub fn store_bd_seq(&self, bd_seq: u64) -> Result<(), OutboxError> {
        self.db
            .execute(
                "INSERT INTO meta (key, value) VALUES ('bd_seq', ?1) ON CONFLICT(key) DO UPDATE SET value = ?1",
                params![(bd_seq % 256) as i64],
            )
            .map_err(err("write bdSeq"))?;
        Ok(())
    }

    /// The last bdSeq kept in the file (none before the first session).
    ///
    /// # Errors
    /// When the file cannot be read.
    pub fn stored_bd_seq(&self) -> Result<Option<u64>, OutboxError> {
        let cur: Option<i64> = self
            .db
            .query_row("SELECT value FROM meta WHERE key = 'bd_seq'", [], |r| {
                r.get(0)
            })
            .optional()
            .map_err(err("read bdSeq"))?;
        Ok(cur.map(|v| v.rem_euclid(256) as u64))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A buffer kept to 2,000 rows while nothing is acknowledged: 10,000
    /// written in transactions of 37, at most 2,999 stay (trimmed every
    /// 1,000), the newest are kept in order, and the dropped are counted.
    #[test]
    fn the_buffer_keeps_its_newest_rows_within_its_limit() {
        let dir = tempfile::tempdir().unwrap();
        let o = Outbox::open_with_limit(&dir.path().join("b"), 2000).unwrap();
        let mut dropped = 0;
        let items: Vec<(Item, u64)> = (0..10_000u64)
            .map(|i| {
                let item = Item::DeviceLost {
                    device: format!("D{i}"),
                };
                (item, i)
            })
            .collect();
        for batch in items.chunks(37) {
            dropped += o.push_many(batch).unwrap();
        }
        let left = o.len().unwrap();
        assert!((2000..3000).contains(&left), "{left}");
        assert_eq!(dropped + left, 10_000);
        let rows = o.next(0, 1).unwrap();
        assert_eq!(rows[0].id, 10_000 - left as i64 + 1);
    }

    /// Rows acknowledged together are deleted together, and only they.
    #[test]
    fn acknowledged_rows_are_deleted_together_and_only_they() {
        let dir = tempfile::tempdir().unwrap();
        let o = Outbox::open(&dir.path().join("b")).unwrap();
        for i in 0..10u64 {
            let item = Item::DeviceLost {
                device: format!("D{i}"),
            };
            o.push(&item, i).unwrap();
        }
        o.done_many(&[2, 3, 7]).unwrap();
        o.done_many(&[]).unwrap();
        let left: Vec<i64> = o.next(0, 20).unwrap().iter().map(|r| r.id).collect();
        assert_eq!(left, [1, 4, 5, 6, 8, 9, 10]);
    }

    #[test]
    fn rows_come_back_in_order_until_acknowledged_and_survive_a_reopen() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("outbox.db");
        {
            let o = Outbox::open(&path).unwrap();
            for i in 0..5 {
                o.push(
                    &Item::Reading {
                        device: "A".into(),
                        json: format!("{{\"n\":{i}}}"),
                    },
                    i,
                )
                .unwrap();
            }
            let rows = o.next(0, 3).unwrap();
            assert_eq!(rows.len(), 3);
            o.done_many(&[rows[0].id, rows[1].id]).unwrap();
            assert_eq!(o.stored_bd_seq().unwrap(), None);
            o.store_bd_seq(0).unwrap();
        }
        let o = Outbox::open(&path).unwrap();
        assert_eq!(o.len().unwrap(), 3);
        let rows = o.next(0, 10).unwrap();
        assert_eq!(
            rows[0].item,
            Item::Reading {
                device: "A".into(),
                json: "{\"n\":2}".into()
            }
        );
        assert_eq!(o.stored_bd_seq().unwrap(), Some(0));
        o.store_bd_seq(1).unwrap();
        assert_eq!(o.stored_bd_seq().unwrap(), Some(1));
    }
}
