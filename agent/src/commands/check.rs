//! `leaktally check`: validate a config and show what it will poll.
//!
//! Prints every device and tank with its registers and the reads each cycle
//! makes, then (unless `--offline`) tries to connect to each device. An
//! unreachable device is a warning, not a failure: the config can be right
//! while the network is not.

use crate::acquire::decode::{DataType, WordOrder};
use crate::acquire::link::Link;
use crate::acquire::plan::{Read, plan_reads};
use crate::config::{Config, Sensor, Table};
use crate::model::PressureTap;
use crate::report;
use std::fmt::Write as _;
use std::path::Path;
use std::time::Instant;

/// Validates and describes a config; returns the text to print.
pub async fn run(path: &Path, offline: bool) -> anyhow::Result<String> {
    let config = crate::config::load(path)?;
    let mut out = describe(&config);
    if !offline {
        let _ = writeln!(out);
        for device in &config.devices {
            let mut link = Link::new(&device.address, device.unit_id, device.request_timeout);
            let started = Instant::now();
            match link.connect().await {
                Ok(()) => {
                    let _ = writeln!(
                        out,
                        "device {}: reachable at {} (connected in {} ms)",
                        device.id,
                        device.address,
                        started.elapsed().as_millis()
                    );
                }
                Err(e) => {
                    let _ = writeln!(
                        out,
                        "warning: device {} is not reachable now: {e}; the agent will keep retrying",
                        device.id
                    );
                }
            }
        }
    }
    Ok(out)
}

/// The human description of a valid config.
pub fn describe(config: &Config) -> String {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "{}: valid. Site \"{}\", {} device(s), {} tank(s), ambient {:.3} kPa absolute.",
        config.path.display(),
        config.site_name,
        config.devices.len(),
        config.tanks.len(),
        config.ambient.si() / 1000.0
    );
    for (d, device) in config.devices.iter().enumerate() {
        let _ = writeln!(
            out,
            "\ndevice {}  {} unit {}, every {} ms, timeout {} ms",
            device.id,
            device.address,
            device.unit_id,
            device.poll_interval.as_millis(),
            device.request_timeout.as_millis()
        );
        for tank in config.tanks.iter().filter(|t| t.device == d) {
            let v = &tank.vessel;
            let _ = writeln!(out, "  tank {}  {}", tank.id, tank.description);
            let _ = writeln!(
                out,
                "    {:.2} tall, holds {:.2}; {} at {:.1}",
                v.geometry().height(),
                v.geometry().capacity(),
                tank.substance,
                v.density()
            );
            if !tank.reportable.is_empty() {
                let list: Vec<String> = tank.reportable.iter().map(|m| report::mass(*m)).collect();
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
    out
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
        format!("{e0}..{e1} {}", s.unit)
    } else {
        format!("raw {r0}..{r1} -> {e0}..{e1} {}", s.unit)
    };
    let step = match s.resolution_si() {
        0.0 => String::new(),
        step => format!(
            ", step {} {}",
            report::significant(step / s.si_per_unit),
            s.unit
        ),
    };
    format!(
        "{role:<10} {} {}  {type_name}{order}  {scaling}{step}",
        Table::Registers(s.register).name(),
        s.address
    )
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
