//! End-to-end and outside-reference tests, one module per topic.
//!
//! * `references`: the physics against outside sources (analytic solutions,
//!   the Python package `fluids`, scipy quadrature), fixtures in tests/fixtures.
//! * `properties`: invariants over random inputs (proptest).
//! * `acquisition`: the simulator and `leaktally poll` as real processes.
//! * `daily`: a site found through LEAKTALLY_CONFIG alone, the event
//!   history, closed events, the exit codes, completions and the man page.
//! * `bands`: whether the band holds the truth, over seeded runs of the
//!   simulator's plant in simulated time.
//! * `interop`: the agent and the simulator against pymodbus, an independent
//!   Modbus implementation.
//! * `python_env`: the pinned Python environment those tests use.
//! * `replay`: replays of a logged event and of a readings file.
//! * `gaps`: data gaps end to end: a leak that stops during a link drop, a
//!   hole plugged while the daemon is down, a back-dated start.
//! * `faults`: link drops, a slow device, failed sensors, a locked
//!   database and a full disk, end to end; Modbus exceptions, miscounted
//!   replies and impossible level steps, flagged and logged once.
//! * `fleet`: `leaktally fleet` against a real mosquitto: published status
//!   documents shown once and in order, a summary closing its event, wrong
//!   credentials and a missing broker said and retried.
//! * `flood`: thousands of idle and slow sockets on the web port while a
//!   client, the pollers and a simulator restart carry on.
//! * `operators`: an operator in the daemon's group acts without root, and
//!   a user outside it is told how to join (real users; needs root).
//! * `longrun`: wall-clock steps under the daemon (faketime), a damaged
//!   database, a request made as the daemon dies.
//! * `serial`: Modbus RTU end to end, the simulator and the agent on a
//!   pty pair made by socat: accuracy, a slow line of 20 gauges, a silent
//!   unit on a shared line.
//! * `tracking`: the simulator, the daemon and the operator CLI as real
//!   processes, against the simulator's ground truth.
//! * `vapour`: a hole above the liquid of a blanketed tank: the agent's
//!   gas total, phase and time to ambient against the simulator's truth.
//! * `web`: the daemon's responder page in headless chromium against
//!   `status --json`, and its metrics through prometheus-client.
//! * `whatif`: `leaktally whatif` as a user runs it, the headspace read
//!   from a database a daemon fills from the simulator.
//! * `mqtt`: publishing to a real broker (Debian's mosquitto): an event's
//!   documents in order, the last will, a 30 s broker outage, a daemon
//!   killed while the broker is down, TLS with a password, anonymous
//!   clients refused, a client certificate; two sites through a broker
//!   outage to `leaktally fleet`, whose totals match each site's.
//! * `broker`: the mosquitto harness (start, stop, restart, subscribers).
//! * `util`: shared helpers.

mod acquisition;
mod bands;
mod broker;
mod daily;
mod faults;
mod fleet;
mod flood;
mod gaps;
mod interop;
mod longrun;
mod loss;
mod mqtt;
mod operators;
mod properties;
mod python_env;
mod references;
mod replay;
mod serial;
mod tracking;
mod util;
mod vapour;
mod web;
mod whatif;
