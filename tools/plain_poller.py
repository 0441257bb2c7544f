#!/usr/bin/env python3
"""The baseline of the side-by-side benchmark (BENCHMARKS.md, "Per-sample
cost"): the poller a site engineer would write instead of the agent.

    python plain_poller.py SITE.toml DB

Reads the site config (tomllib), and for every device the same registers
the agent reads, coalesced into the same blocks (up to 125 registers of one
table, contiguous), with pymodbus's asyncio client, one connection and one
task per device, every device's poll interval. Decodes each tank's level
(a u16 scaled from its raw span to its range, or an f32) and pressure (an
f32, kPa to Pa) and stores one row per tank and cycle in SQLite (WAL mode,
SQLite's defaults otherwise), the rows of a tick in one transaction, one
commit a tick: a row per sample in a table with an index on (tank, time),
as one would query it later. No quality flags, no estimator. Runs until
SIGTERM or Ctrl-C. Written against pymodbus 3.16.1 (tests/python/
requirements.txt pins it); the benchmark script runs it in that venv.
"""

import asyncio
import signal
import sqlite3
import struct
import sys
import time
import tomllib

from pymodbus.client import AsyncModbusTcpClient


def blocks(values):
    """Coalesces (table, address, width, key) into reads of up to 125
    contiguous registers of one table: (table, start, count, [(key, offset, width)])."""
    out = []
    for table in ("input", "holding"):
        vals = sorted((a, w, k) for t, a, w, k in values if t == table)
        cur = None
        for a, w, k in vals:
            if cur and a == cur[1] + cur[2] and a + w - cur[1] <= 125:
                cur[2] = a + w - cur[1]
                cur[3].append((k, a - cur[1], w))
            else:
                if cur:
                    out.append(tuple(cur))
                cur = [table, a, w, [(k, 0, w)]]
        if cur:
            out.append(tuple(cur))
    return out


def decoder(sensor):
    """Turns a sensor's registers into its value in SI units."""
    kind = sensor.get("type", "u16")
    lo, hi = sensor.get("range", [0.0, 1.0])
    unit = sensor.get("unit", "m")
    scale = {"kPa": 1000.0, "Pa": 1.0, "m": 1.0, "mm": 0.001}.get(unit, 1.0)
    if kind == "f32":
        high_first = sensor.get("word_order", "high_first") == "high_first"

        def f32(regs):
            a, b = (regs[0], regs[1]) if high_first else (regs[1], regs[0])
            return struct.unpack(">f", struct.pack(">HH", a, b))[0] * scale

        return f32
    raw_lo, raw_hi = sensor.get("raw", [0, 65535])

    def u16(regs):
        return (lo + (regs[0] - raw_lo) * (hi - lo) / (raw_hi - raw_lo)) * scale

    return u16


async def poll(device, tanks, queue):
    host, port = device["address"].rsplit(":", 1)
    client = AsyncModbusTcpClient(host, port=int(port), timeout=device.get("request_timeout_ms", 500) / 1000)
    await client.connect()
    values = []
    decoders = {}
    for tank in tanks:
        for role in ("level", "pressure"):
            s = tank.get(role)
            if s:
                width = 2 if s.get("type") in ("f32", "u32", "i32") else 1
                values.append((s["register"], s["address"], width, (tank["id"], role)))
                decoders[(tank["id"], role)] = decoder(s)
    reads = blocks(values)
    unit = device.get("unit_id", 1)
    interval = device.get("poll_interval_ms", 1000) / 1000
    next_at = time.monotonic()
    while True:
        at_ms = int(time.time() * 1000)
        got = {}
        for table, start, count, parts in reads:
            call = client.read_input_registers if table == "input" else client.read_holding_registers
            rr = await call(start, count=count, device_id=unit)
            if rr.isError():
                continue
            for key, offset, width in parts:
                got[key] = decoders[key](rr.registers[offset : offset + width])
        rows = [(t["id"], at_ms, got.get((t["id"], "level")), got.get((t["id"], "pressure"))) for t in tanks]
        await queue.put(rows)
        next_at += interval
        await asyncio.sleep(max(0.0, next_at - time.monotonic()))


async def main():
    if len(sys.argv) != 3:
        sys.exit(__doc__)
    site = tomllib.load(open(sys.argv[1], "rb"))
    db = sqlite3.connect(sys.argv[2], isolation_level=None)
    db.execute("PRAGMA journal_mode = WAL")
    db.execute(
        "CREATE TABLE IF NOT EXISTS readings (tank TEXT NOT NULL, at_ms INTEGER NOT NULL, level_m REAL, pressure_pa REAL)"
    )
    db.execute("CREATE INDEX IF NOT EXISTS readings_by_tank ON readings (tank, at_ms)")
    queue = asyncio.Queue()
    tasks = []
    for device in site["device"]:
        tanks = [t for t in site["tank"] if t["device"] == device["id"]]
        if tanks:
            tasks.append(asyncio.create_task(poll(device, tanks, queue)))
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)
    stored = 0
    while not stop.is_set():
        getter = asyncio.create_task(queue.get())
        stopper = asyncio.create_task(stop.wait())
        done, _ = await asyncio.wait({getter, stopper}, return_when=asyncio.FIRST_COMPLETED)
        if getter not in done:
            getter.cancel()
            break
        stopper.cancel()
        rows = getter.result()
        # The rest of the tick joins this commit.
        await asyncio.sleep(0.1)
        while not queue.empty():
            rows += queue.get_nowait()
        db.execute("BEGIN")
        db.executemany("INSERT INTO readings VALUES (?, ?, ?, ?)", rows)
        db.execute("COMMIT")
        stored += len(rows)
    for t in tasks:
        t.cancel()
    print(f"plain poller: stopped, {stored} samples stored", file=sys.stderr)


if __name__ == "__main__":
    asyncio.run(main())
