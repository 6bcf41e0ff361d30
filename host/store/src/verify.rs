//! Chain verification over any back end: every changed, removed or
//! reordered record, by position.

use crate::chain::{self, ChainProblem, ChainReport, ChainedRecord, Hash, GENESIS, MAX_PROBLEMS};
use crate::error::StoreError;
use crate::traits::RecordRead;

/// Walks the whole chain of `store` and reports every changed, removed or
/// reordered record by position (see [`ChainProblem`]). Reads only what
/// [`RecordRead::for_each_record`] and [`RecordRead::chain_head`] give, so
/// it checks every back end alike.
///
/// # Errors
/// [`StoreError`] on a database failure (a damaged chain is not an error:
/// it is the report).
pub fn verify_chain(store: &(impl RecordRead + ?Sized)) -> Result<ChainReport, StoreError> {
    struct Bad {
        rec: ChainedRecord,
        prev: Hash,
    }
    let mut records = 0u64;
    let mut expected = 1u64;
    let mut prev = GENESIS;
    let mut last_position = 0u64;
    let mut problems = Vec::new();
    let mut bad: Vec<Bad> = Vec::new();
    let mut truncated = false;
    // The head first: what a writer commits while the records are walked
    // (a gateway or monitor writing the store meanwhile) lies beyond it and
    // is left to the next verification. Every record up to the head was
    // committed with it or before, so the walk sees all of them even where
    // each table's query reads the file as it is when that query starts;
    // read after the walk, a head that had moved on reported a break that
    // was not there (51 of 77 verifications beside a writer,
    // `host/sqlite/tests/live_verify.rs`).
    let (head_pos, head_hash) = store.chain_head()?;
    let mut beyond = 0u64;
    store.for_each_record(&mut |rec| {
        if rec.position > head_pos {
            beyond = beyond.max(rec.position);
            return Ok(());
        }
        records += 1;
        if rec.position > expected {
            problems.push(ChainProblem::Missing {
                first: expected,
                last: rec.position - 1,
            });
        }
        let h = chain::link(&prev, rec.position, rec.table, &rec.canonical());
        // A record right after a gap cannot be checked against its
        // predecessor's hash: the gap is already reported.
        if h != rec.hash && rec.position <= expected {
            if bad.len() < MAX_PROBLEMS {
                bad.push(Bad {
                    rec: rec.clone(),
                    prev,
                });
            } else {
                truncated = true;
            }
        }
        prev = rec.hash;
        last_position = rec.position;
        expected = rec.position.saturating_add(1);
        Ok(())
    })?;
    // Reordering: a bad record that verifies at another bad record's place.
    for b in &bad {
        let canon = b.rec.canonical();
        let home = bad.iter().find(|o| {
            o.rec.position != b.rec.position && o.rec.table == b.rec.table && {
                let h = chain::link(&o.prev, o.rec.position, b.rec.table, &canon);
                h == o.rec.hash || h == b.rec.hash
            }
        });
        problems.push(match home {
            Some(o) => ChainProblem::Moved {
                position: b.rec.position,
                belongs_at: o.rec.position,
                table: b.rec.table,
                key: b.rec.key(),
            },
            None => ChainProblem::Changed {
                position: b.rec.position,
                table: b.rec.table,
                key: b.rec.key(),
            },
        });
    }
    if head_pos > last_position {
        problems.push(ChainProblem::Missing {
            first: last_position + 1,
            last: head_pos,
        });
    }
    if head_pos != last_position || head_hash != prev {
        problems.push(ChainProblem::HeadMismatch {
            head_position: head_pos,
            last_position,
        });
    }
    // A record beyond the head must be a writer's since: the head has moved
    // past it by now. One no head covers was added behind the chain's back.
    if beyond > 0 {
        let (now_pos, _) = store.chain_head()?;
        if beyond > now_pos {
            problems.push(ChainProblem::HeadMismatch {
                head_position: now_pos,
                last_position: beyond,
            });
        }
    }
    problems.sort_by_key(|p| match p {
        ChainProblem::Changed { position, .. } | ChainProblem::Moved { position, .. } => *position,
        ChainProblem::Missing { first, .. } => *first,
        ChainProblem::HeadMismatch { .. } => u64::MAX,
    });
    if problems.len() > MAX_PROBLEMS {
        problems.truncate(MAX_PROBLEMS);
        truncated = true;
    }
    Ok(ChainReport {
        records,
        last_position,
        last_hash: chain::hex(&prev),
        problems,
        truncated,
    })
}
