//! `leaktally fleet`: a read-only central view of many sites, from what
//! their agents publish on an MQTT broker (issue 18).
//!
//! The view subscribes to the sites' topics ([`topics`]), keeps the latest
//! document of every site and event in memory ([`board`], pure), and serves
//! a page for responders, `/api/fleet` and `/metrics` ([`view`], [`http`]).
//! It keeps no authority of its own: it writes nothing, to the broker or
//! anywhere, and the sites' databases stay the record; restarted, it learns
//! everything again from the retained documents. The connection
//! ([`mqtt`]) keeps retrying while the broker is unreachable, and the page
//! says since when.
//!
//! Left out: publishing (the agent's side, `[mqtt]` in the site config).

pub mod board;
pub mod http;
pub mod mqtt;
pub mod topics;
pub mod view;

#[cfg(test)]
pub(crate) mod testing;
