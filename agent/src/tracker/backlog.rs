//! The write-behind backlog: poll cycles taken from acquisition, with the
//! figures and latest estimates they made, waiting for the store, oldest
//! first. Nothing acquired leaves it but by a commit, or, past a bound
//! while the database takes nothing, the oldest samples of tanks with no
//! open event.

use crate::acquire::sample::TankSample;
use crate::estimate::{Estimate, Figures};
use crate::store::outbox::Message;
use crate::store::{StoreResult, Tx, block_of};
use std::collections::{HashSet, VecDeque};
use std::sync::Arc;

/// What one poll cycle of a device brings for the store: its samples (a
/// block of its sample set when `set` is known), the figures of each open
/// event they fed, and each such event's latest whole estimate.
#[derive(Debug, Default, Clone)]
pub(super) struct Write {
    pub(super) samples: Vec<TankSample>,
    /// The device's sample set, when `samples` is its whole cycle in slot
    /// order; otherwise the samples go under a set of their own.
    pub(super) set: Option<i64>,
    /// (event, revision, figures).
    pub(super) figures: Vec<(i64, i64, Vec<Figures>)>,
    /// (event, revision, the whole estimate after the cycle).
    pub(super) latest: Vec<(i64, i64, Estimate)>,
    /// Messages for the MQTT broker (`tracker::outgoing`), and the
    /// outbox's bound.
    pub(super) outbox: Vec<Message>,
    pub(super) outbox_limit: usize,
}

impl Write {
    /// Writes it, in the caller's unit; returns how many older outbox
    /// messages were given up to the bound.
    pub(super) fn store(&self, tx: &mut Tx<'_>) -> StoreResult<u64> {
        match (self.set, self.samples.first()) {
            (Some(set), Some(first)) => {
                tx.insert_block(set, first.at_ms, &block_of(&self.samples))?;
            }
            _ => {
                tx.insert_samples(&self.samples)?;
            }
        }
        for (event, revision, figures) in &self.figures {
            tx.insert_figures(*event, *revision, figures)?;
        }
        for (event, revision, estimate) in &self.latest {
            tx.put_latest(*event, *revision, estimate)?;
        }
        if self.outbox.is_empty() {
            return Ok(0);
        }
        tx.enqueue(&self.outbox, self.outbox_limit)
    }
}

/// The writes not yet committed, oldest first.
#[derive(Debug, Default)]
pub(super) struct Backlog {
    writes: VecDeque<Arc<Write>>,
    samples: usize,
}

impl Backlog {
    pub(super) fn push(&mut self, write: Write) {
        self.samples += write.samples.len();
        self.writes.push_back(Arc::new(write));
    }

    pub(super) fn is_empty(&self) -> bool {
        self.writes.is_empty()
    }

    /// Poll cycles held.
    pub(super) fn cycles(&self) -> usize {
        self.writes.len()
    }

    /// Samples held.
    pub(super) fn samples(&self) -> usize {
        self.samples
    }

    /// Up to `n` of the oldest writes, shared (not copied) for a unit.
    pub(super) fn oldest(&self, n: usize) -> Vec<Arc<Write>> {
        self.writes.iter().take(n).cloned().collect()
    }

    /// Drops the `n` oldest writes, committed; returns their samples.
    pub(super) fn committed(&mut self, n: usize) -> usize {
        let mut stored = 0;
        for _ in 0..n {
            if let Some(w) = self.writes.pop_front() {
                stored += w.samples.len();
            }
        }
        self.samples -= stored;
        stored
    }

    /// Keeps the held samples at or under `max` by giving up the oldest
    /// samples of tanks not in `tracked` (config indices); returns how
    /// many went.
    pub(super) fn bound(&mut self, max: usize, tracked: &HashSet<usize>) -> usize {
        let mut dropped = 0;
        for write in self.writes.iter_mut() {
            if self.samples - dropped <= max {
                break;
            }
            let w = Arc::make_mut(write);
            let before = w.samples.len();
            w.samples.retain(|s| tracked.contains(&s.tank));
            if w.samples.len() != before {
                // No longer a whole cycle: stored under a set of its own.
                w.set = None;
            }
            dropped += before - w.samples.len();
        }
        self.samples -= dropped;
        dropped
    }
}
