//! `leaktally check`: validate a config and show what it will poll.
//!
//! Prints every device and tank with its registers and the reads each cycle
//! makes, then (unless `--offline`) reads every planned block of every
//! device once and shows, per block, the values decoded in their units and
//! flagged as the agent would flag them, or the Modbus exception with what
//! it means and what to check (a wrong unit id, an address the device does
//! not have, a function it does not serve). Opening a TCP connection proves
//! nothing on its own: a gateway accepts connections for units it cannot
//! reach.
//!
//! A device or block that fails is a warning in the text, and the command
//! then exits with [`DevicesFailed`] (exit code 2 from the binary), so a
//! script can tell a config that is valid but not yet answered from one
//! that is invalid (exit code 1) or fully answered (0).

use crate::acquire::link::{Link, LinkError, Words, exception_hint};
use crate::acquire::plan::{Read, plan_reads};
use crate::acquire::poller::{describe_read, flag};
use crate::acquire::serial::{Buses, least_round};
use crate::config::{Config, Device, Role, Sensor};
use crate::logging::one_line;
use crate::model::PressureTap;
use crate::registers::Table;
use crate::registers::{DataType, WordOrder};
use crate::report;
use std::fmt::Write as _;
use std::path::Path;
use std::time::Instant;

/// The config is valid, but devices or reads failed; the text says which.
#[derive(Debug, thiserror::Error)]
#[error(
    "{devices} of {of} device(s) failed the check ({blocks} read(s) not answered properly); see the warnings above"
)]
pub struct DevicesFailed {
    pub devices: usize,
    pub of: usize,
    pub blocks: usize,
}

/// What `check` found: the text to print, and what failed.
#[derive(Debug)]
pub struct Checked {
    pub text: String,
    pub failed: Option<DevicesFailed>,
    /// How many devices the config has.
    pub devices: usize,
}

/// `leaktally check`'s options.
#[derive(Debug, clap::Args)]
pub struct CheckArgs {
    #[command(flatten)]
    pub config: super::args::ConfigArg,
    /// Only validate and describe: do not read the devices.
    #[arg(long)]
    pub offline: bool,
    /// Print a JSON summary for machines instead of the account (the
    /// account's text is in its `text` field).
    #[arg(long)]
    pub json: bool,
}

/// What `check --json` prints. An invalid config prints no document: the
/// problems go to standard error, with exit code 1, as without --json.
#[derive(Debug, serde::Serialize)]
struct CheckDocument<'a> {
    /// Version of this document's layout (README, "Formats").
    format: u32,
    config: String,
    valid: bool,
    /// Whether the devices were read (not with --offline).
    devices_read: bool,
    /// Devices that failed, of how many, and reads not answered properly.
    devices_failed: usize,
    devices: usize,
    reads_failed: usize,
    text: &'a str,
}

/// Runs `leaktally check` as the command line gave it and prints the
/// account; a valid config whose devices did not all answer is a
/// [`DevicesFailed`] error, for the binary's exit code.
pub fn command(args: CheckArgs) -> anyhow::Result<()> {
    let path = args.config.required_path()?;
    let checked = super::args::runtime()?.block_on(run(&path, args.offline))?;
    if args.json {
        let doc = CheckDocument {
            format: 1,
            config: path.display().to_string(),
            valid: true,
            devices_read: !args.offline,
            devices_failed: checked.failed.as_ref().map_or(0, |f| f.devices),
            devices: checked.devices,
            reads_failed: checked.failed.as_ref().map_or(0, |f| f.blocks),
            text: &checked.text,
        };
        println!("{}", serde_json::to_string_pretty(&doc)?);
    } else {
        print!("{}", checked.text);
    }
    match checked.failed {
        // The binary exits with exit::DEVICES_FAILED for this.
        Some(failed) => Err(failed.into()),
        None => Ok(()),
    }
}

/// Validates and describes a config and, unless `offline`, reads every
/// planned block of every device once.
pub async fn run(path: &Path, offline: bool) -> anyhow::Result<Checked> {
    let config = crate::config::load(path)?;
    let mut out = describe(&config);
    if offline {
        return Ok(Checked {
            text: out,
            failed: None,
            devices: config.devices.len(),
        });
    }
    let (mut failed_devices, mut failed_blocks) = (0, 0);
    // Devices on one serial port share its bus, as the daemon's do.
    let buses = Buses::for_config(&config);
    for (d, device) in config.devices.iter().enumerate() {
        let reads = plan_reads(&config, d, device.bridge_gaps);
        if reads.is_empty() {
            continue;
        }
        let _ = writeln!(out);
        let failed = probe(&config, device, &buses, &reads, &mut out).await;
        if failed > 0 {
            failed_devices += 1;
            failed_blocks += failed;
        }
    }
    let failed = (failed_devices > 0).then_some(DevicesFailed {
        devices: failed_devices,
        of: config.devices.len(),
        blocks: failed_blocks,
    });
    Ok(Checked {
        text: out,
        failed,
        devices: config.devices.len(),
    })
}

/// Reads each block of one device once and writes what came back; returns
/// how many blocks failed.
async fn probe(
    config: &Config,
    device: &Device,
    buses: &Buses,
    reads: &[Read],
    out: &mut String,
) -> usize {
    let name = format!(
        "{} ({} unit {})",
        one_line(&device.id),
        one_line(&device.address),
        device.unit_id
    );
    let mut link = Link::for_device(device, buses);
    let started = Instant::now();
    if let Err(e) = link.connect().await {
        let _ = writeln!(
            out,
            "warning: device {name} is not reachable: {}; none of its {} read(s) was made; the agent would keep retrying",
            one_line(&e.to_string()),
            reads.len()
        );
        return reads.len();
    }
    let _ = writeln!(
        out,
        "device {name}: connected in {} ms; reading each block once",
        started.elapsed().as_millis()
    );
    let mut failed = 0;
    for read in reads {
        // A failed exchange drops the connection; the next block gets a
        // fresh one, as the agent's next cycle would.
        let began = Instant::now();
        let result = match link.connect().await {
            Ok(()) => link.read(read).await,
            Err(e) => Err(e),
        };
        let what = one_line(&describe_read(config, read)).into_owned();
        match result {
            Ok(words) => {
                let _ = writeln!(
                    out,
                    "  {what}: answered in {} ms",
                    began.elapsed().as_millis()
                );
                for line in values(config, read, &words) {
                    let _ = writeln!(out, "      {line}");
                }
            }
            Err(e) => {
                failed += 1;
                let _ = writeln!(
                    out,
                    "  warning: {what}: {}; {}",
                    one_line(&e.to_string()),
                    hint(&e, device)
                );
            }
        }
    }
    failed
}

/// What to do about a failed read.
fn hint(e: &LinkError, device: &Device) -> String {
    match e {
        LinkError::Exception {
            code: code @ (4 | 10 | 11),
        } => format!(
            "{} (unit_id is {} for device {})",
            exception_hint(*code),
            device.unit_id,
            one_line(&device.id)
        ),
        LinkError::Exception { code } => exception_hint(*code).to_owned(),
        LinkError::Malformed { .. } => {
            "the device or a gateway answered with the wrong number of values; the agent flags such replies device_error".into()
        }
        LinkError::Timeout(_) => {
            "the device did not answer in time: check unit_id (some gateways stay silent for an unknown unit), or raise request_timeout_ms".into()
        }
        _ => "check the address, the network and the device".into(),
    }
}

/// One line per value of a block: decoded, in its unit, flagged as the
/// agent would flag it (without the stuck and step checks, which need a
/// history).
fn values(config: &Config, read: &Read, words: &Words) -> Vec<String> {
    let mut lines = Vec::new();
    for &(tank, role) in &read.values {
        let t = &config.tanks[tank];
        let who = format!("{} {}", one_line(&t.id), role.name());
        let line = match (words, role) {
            (Words::Bits(bits), Role::LeakFlag) => {
                let bit = t
                    .leak_flag
                    .and_then(|f| bits.get(usize::from(f.address - read.start)).copied());
                match bit {
                    Some(true) => format!("{who}: raised"),
                    Some(false) => format!("{who}: not raised"),
                    None => format!("{who}: missing from the reply"),
                }
            }
            (Words::Registers(regs), role) => {
                let sensor = match role {
                    Role::Level => Some(&t.level),
                    Role::Pressure => t.pressure.as_ref().map(|p| &p.sensor),
                    Role::Transfer => t.transfer.as_ref(),
                    Role::Temperature => t.temperature.as_ref(),
                    Role::LeakFlag => None,
                };
                // A pressure says what its zero is.
                let reference = match (role, &t.pressure) {
                    (Role::Pressure, Some(p)) if p.absolute => " absolute",
                    (Role::Pressure, Some(_)) => " gauge",
                    _ => "",
                };
                match sensor {
                    Some(s) => {
                        let from = usize::from(s.address - read.start);
                        let to = from + usize::from(s.data_type.width());
                        match regs.get(from..to) {
                            Some(w) => value_line(&who, s, w, reference),
                            None => format!("{who}: missing from the reply"),
                        }
                    }
                    None => format!("{who}: not a register value"),
                }
            }
            _ => format!("{who}: a reply of the wrong kind"),
        };
        lines.push(line);
    }
    lines
}

/// "FF-T12 level: 4.2 m (raw 17440), good", or the flag and why.
fn value_line(who: &str, s: &Sensor, words: &[u16], reference: &str) -> String {
    let raw = s.data_type.decode(words, s.word_order);
    let reading = flag(s, words, false);
    let unit = format!("{}{reference}", one_line(&s.unit));
    let raw_text = match raw {
        Some(r) if (s.raw_span.0, s.raw_span.1) != s.engineering_span => {
            format!(" (raw {})", plain(r))
        }
        _ => String::new(),
    };
    match (reading.value, raw) {
        (Some(si), _) => format!(
            "{who}: {} {unit}{raw_text}, good",
            plain((si - s.si_offset) / s.si_per_unit)
        ),
        (None, Some(r)) => {
            let shown = (s.to_si(r) - s.si_offset) / s.si_per_unit;
            let (lo, hi) = s.engineering_span;
            format!(
                "{who}: {} {unit}{raw_text}, flagged {} ({}; range {} to {} {unit})",
                plain(shown),
                reading.quality.key(),
                reading.quality.reason(),
                plain(lo),
                plain(hi)
            )
        }
        (None, None) => format!(
            "{who}: flagged {} ({})",
            reading.quality.key(),
            reading.quality.reason()
        ),
    }
}

/// A value to four decimals at most, trailing zeros dropped.
fn plain(x: f64) -> String {
    if !x.is_finite() {
        return format!("{x}");
    }
    let text = format!("{x:.4}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    if text == "-0" {
        "0".into()
    } else {
        text.into()
    }
}

/// The human description of a valid config.
pub fn describe(config: &Config) -> String {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "{}: valid. Site \"{}\", {} device(s), {} tank(s), ambient {:.3} kPa absolute.",
        one_line(&config.path.display().to_string()),
        one_line(&config.site_name),
        config.devices.len(),
        config.tanks.len(),
        config.ambient.si() / 1000.0
    );
    let people = crate::report::Presentation::of(config);
    let _ = writeln!(
        out,
        "Times shown in {}; figures in {} units; database {}.",
        people.zone_text(crate::store::now_ms()),
        config.units.name(),
        config.database.as_ref().map_or(
            "not named in the config (the other commands then need --db or LEAKTALLY_DB)".into(),
            |db| { one_line(&db.display().to_string()).into_owned() }
        )
    );
    for (d, device) in config.devices.iter().enumerate() {
        let _ = writeln!(
            out,
            "\ndevice {}  {} unit {}, every {} ms, timeout {} ms",
            one_line(&device.id),
            one_line(&device.address),
            device.unit_id,
            device.poll_interval.as_millis(),
            device.request_timeout.as_millis()
        );
        if let Some(line) = &device.serial {
            let _ = writeln!(
                out,
                "  Modbus RTU at {} baud, {} data bits, parity {}, {} stop bit(s); {:.2} ms of silence before each request",
                line.baud_rate,
                line.data_bits,
                line.parity.name(),
                line.stop_bits,
                device.inter_request_delay.as_secs_f64() * 1000.0
            );
        }
        for tank in config.tanks.iter().filter(|t| t.device == d) {
            let v = &tank.vessel;
            let _ = writeln!(
                out,
                "  tank {}  {}",
                one_line(&tank.id),
                one_line(&tank.description)
            );
            let _ = writeln!(
                out,
                "    {:.2} tall, holds {:.2}; {} at {:.1}",
                v.geometry().height(),
                v.geometry().capacity(),
                one_line(&tank.substance),
                v.density()
            );
            if !tank.reportable.is_empty() {
                let list: Vec<String> = tank.reportable.iter().map(|m| people.mass(*m)).collect();
                let _ = writeln!(out, "    reportable quantities: {}", list.join(", "));
            }
            let _ = writeln!(out, "    {}", sensor_line("level", &tank.level));
            match &tank.pressure {
                Some(p) => {
                    let where_ = match p.tap {
                        PressureTap::Headspace => "in the headspace".to_owned(),
                        PressureTap::Submerged { elevation } => format!("tap at {elevation:.2}"),
                    };
                    let reference = if p.absolute { "absolute" } else { "gauge" };
                    let _ = writeln!(
                        out,
                        "    {}, {reference}, {where_}",
                        sensor_line("pressure", &p.sensor)
                    );
                }
                None => {
                    let _ = writeln!(
                        out,
                        "    pressure   none mapped: headspace assumed at {} kPa gauge",
                        tank.assumed_headspace.si() / 1000.0
                    );
                }
            }
            if let Some(s) = &tank.transfer {
                let _ = writeln!(out, "    {} (into the tank)", sensor_line("transfer", s));
            }
            if let Some(s) = &tank.temperature {
                let _ = writeln!(out, "    {}", sensor_line("temperature", s));
            }
            let _ = writeln!(out, "    {}", accuracy_line(tank));
            if let Some(f) = &tank.leak_flag {
                let _ = writeln!(
                    out,
                    "    leak flag  {} {}",
                    Table::Bits(f.kind).name(),
                    f.address
                );
            }
        }
        let reads = plan_reads(config, d, device.bridge_gaps);
        let _ = writeln!(out, "  reads each cycle ({}):", reads.len());
        for read in &reads {
            let _ = writeln!(out, "    {}", read_line(read));
        }
    }
    serial_rounds(config, &mut out);
    mqtt_lines(config, &mut out);
    out
}

/// The MQTT publishing: where, as whom, under which topics (which the
/// broker's access list must name exactly), and whether the files it
/// needs can be read now.
fn mqtt_lines(config: &Config, out: &mut String) {
    let Some(m) = &config.mqtt else {
        return;
    };
    let _ = writeln!(
        out,
        "MQTT: publishes to {}:{} ({}, QoS {}){}, client id {}, under {}/{}/# (the broker's access list must allow exactly this to this user).",
        one_line(&m.host),
        m.port,
        if m.tls() { "TLS" } else { "no TLS" },
        m.qos,
        m.username
            .as_ref()
            .map_or(String::new(), |u| format!(", user {}", one_line(u))),
        one_line(&m.client_id),
        one_line(&m.topic_prefix),
        one_line(&m.site_id)
    );
    for (what, file) in [
        ("password file", &m.password_file),
        ("CA file", &m.ca_file),
        ("client certificate", &m.client_cert_file),
        ("client key", &m.client_key_file),
    ] {
        let Some(file) = file else { continue };
        // The path the daemon will open, whatever folder check ran from.
        let full = std::path::absolute(file).unwrap_or_else(|_| file.clone());
        let shown = one_line(&full.display().to_string()).into_owned();
        let _ = match std::fs::File::open(file) {
            Ok(_) => writeln!(out, "  {what} {shown}: readable."),
            Err(e) => writeln!(
                out,
                "  WARNING: {what} {shown} cannot be read ({e}): the daemon will not reach the broker until it can; its messages wait in the outbox meanwhile."
            ),
        };
    }
}

/// Per serial port: how long a round of its devices takes at least, and a
/// warning when that is longer than a poll interval on it (the devices are
/// then read less often than configured).
fn serial_rounds(config: &Config, out: &mut String) {
    let mut ports: Vec<&str> = config
        .devices
        .iter()
        .filter_map(|d| d.serial.as_ref().map(|l| l.port.as_str()))
        .collect();
    ports.sort_unstable();
    ports.dedup();
    for port in ports {
        let (round, devices) = least_round(config, port);
        let Some(fastest) = devices
            .iter()
            .map(|&i| &config.devices[i])
            .min_by_key(|d| d.poll_interval)
        else {
            continue;
        };
        let round_ms = round.as_secs_f64() * 1000.0;
        let _ = writeln!(
            out,
            "\nserial port {}: {} device(s), asked in turn; a round takes at least {round_ms:.0} ms on the wire (requests, replies and the silences before them)",
            one_line(port),
            devices.len()
        );
        if round > fastest.poll_interval {
            let _ = writeln!(
                out,
                "warning: serial port {}: a round takes at least {round_ms:.0} ms, longer than device {}'s poll_interval_ms = {}; its devices will be read less often than configured: lengthen poll_interval_ms, raise the baud rate, or split the devices over two ports",
                one_line(port),
                one_line(&fastest.id),
                fastest.poll_interval.as_millis()
            );
        }
    }
}

fn sensor_line(role: &str, s: &Sensor) -> String {
    let type_name = match s.data_type {
        DataType::U16 => "u16",
        DataType::I16 => "i16",
        DataType::U32 => "u32",
        DataType::I32 => "i32",
        DataType::F32 => "f32",
    };
    let order = match (s.data_type.width(), s.word_order) {
        (1, _) => "",
        (_, WordOrder::HighFirst) => " high word first",
        (_, WordOrder::LowFirst) => " low word first",
    };
    let (r0, r1) = s.raw_span;
    let (e0, e1) = s.engineering_span;
    let scaling = if (r0, r1) == (e0, e1) {
        format!("{e0}..{e1} {}", one_line(&s.unit))
    } else {
        format!("raw {r0}..{r1} -> {e0}..{e1} {}", one_line(&s.unit))
    };
    let step = match s.resolution_si() {
        0.0 => String::new(),
        step => format!(
            ", step {} {}",
            report::number(step / s.si_per_unit),
            one_line(&s.unit)
        ),
    };
    format!(
        "{role:<10} {} {}  {type_name}{order}  {scaling}{step}",
        Table::Registers(s.register).name(),
        s.address
    )
}

/// The accuracies the band rests on, each marked as the config's own or
/// a default, and how the density follows temperature.
fn accuracy_line(tank: &crate::config::Tank) -> String {
    let mark = |stated: bool| if stated { "" } else { " (default)" };
    let mut parts = vec![format!(
        "level ±{} mm{}",
        report::number(tank.level.accuracy.bound * 1000.0),
        mark(tank.level.accuracy.stated)
    )];
    if let Some(p) = &tank.pressure {
        parts.push(format!(
            "pressure ±{} kPa{}",
            report::number(p.sensor.accuracy.bound / 1000.0),
            mark(p.sensor.accuracy.stated)
        ));
    }
    if let Some(s) = &tank.transfer {
        parts.push(format!(
            "transfer ±{} % of the reading{}",
            report::number(s.accuracy.bound * 100.0),
            mark(s.accuracy.stated)
        ));
    }
    if let Some(s) = &tank.temperature {
        parts.push(format!(
            "temperature ±{} °C{}",
            report::number(s.accuracy.bound),
            mark(s.accuracy.stated)
        ));
    }
    parts.push(format!(
        "density ±{} %{}",
        report::number(tank.density_uncertainty.bound * 100.0),
        mark(tank.density_uncertainty.stated)
    ));
    let density = match &tank.density {
        crate::model::DensityModel::Constant(_) => "; density fixed".to_owned(),
        crate::model::DensityModel::Expansion { at, per_kelvin, .. } => format!(
            "; density follows the temperature ({per_kelvin} per °C from {} °C)",
            report::number(at.si() - 273.15)
        ),
        crate::model::DensityModel::Table(points) => {
            format!(
                "; density follows the temperature ({} table points)",
                points.len()
            )
        }
    };
    let defaults = if tank.level.accuracy.stated && tank.density_uncertainty.stated {
        ""
    } else {
        "; defaults are common practice, not your instruments': state the data sheet's figures (config/reference.toml)"
    };
    format!("accuracy   {}{density}{defaults}", parts.join(", "))
}

fn read_line(read: &Read) -> String {
    let what = match read.table {
        Table::Registers(_) => "registers",
        Table::Bits(_) => "bits",
    };
    format!(
        "function {:02} {} {}..{} ({} {what}, {} value(s))",
        read.function_code(),
        read.table.name(),
        read.start,
        u32::from(read.start) + u32::from(read.count) - 1,
        read.count,
        read.values.len()
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The broker's access list must name the topics exactly: check says
    /// which, and a file the daemon cannot read, by its full path.
    #[test]
    fn check_says_the_mqtt_topics_and_an_unreadable_file() {
        let text = format!(
            "{}\n[mqtt]\nbroker = \"127.0.0.1:1883\"\nsite_id = \"depot-7\"\nusername = \"depot-7\"\npassword_file = \"no-such.pw\"\n",
            crate::config::tests::BASE
        );
        let folder = std::env::temp_dir();
        let config = crate::config::parse(&text, &folder.join("site.toml")).unwrap();
        let said = describe(&config);
        assert!(
            said.contains("user depot-7") && said.contains("under leaktally/depot-7/#"),
            "{said}"
        );
        let missing = folder.join("no-such.pw");
        assert!(
            said.contains(&format!(
                "WARNING: password file {} cannot be read",
                missing.display()
            )),
            "{said}"
        );
    }
}
