"""A pymodbus Modbus TCP client for leaktally's interoperability tests.

    python peer_client.py HOST:PORT --unit N [--f32 ADDR]... [--u16 ADDR]...
                          [--coil ADDR]... [--write ADDR] [--oversize ADDR]
                          [--bad-address ADDR]

Reads a Modbus TCP server (in the tests: leaktally-sim) with pymodbus 3.16.1,
an independent Modbus implementation, and decodes what it reads with
pymodbus's own converter, so that the simulator's encoding is checked against
someone else's decoder. Prints one JSON document on stdout:

  reads[]           one per --f32 (holding, 2 registers, decoded as FLOAT32
                    with word_order "big" and "little"), --u16 (input, 1
                    register) and --coil; each has "registers" or "bits", or
                    "exception_code" when the server answered an exception
  write_register    --write: one FC06 write of the register's own value back
                    (harmless if it were accepted); "exception_code" (1 =
                    IllegalFunction for a read-only server) or null
  oversize_read     --oversize: FC03 of 126 registers, one over the protocol's
                    limit of 125. pymodbus refuses to encode that itself
                    ("client_refused" says how), so the request's limit is
                    lifted for this one request to see what the server does
  bad_address_read  --bad-address: FC03 of 2 registers there

A request that got neither data nor an exception (no answer, or one pymodbus
cannot decode) has "error" instead. Exit code 0 when the report was printed,
1 when the server could not be reached.
"""

from __future__ import annotations

import argparse
import json
import math
import sys

import pymodbus
from pymodbus.client import ModbusTcpClient
from pymodbus.exceptions import ModbusException
from pymodbus.pdu.register_message import ReadHoldingRegistersRequest

PINNED = "3.16.1"


def finite(x: float) -> float | None:
    """JSON has no NaN or infinity: report those as null (the registers stay)."""
    return x if math.isfinite(x) else None


def answer(call, *args, **kwargs) -> dict:
    """Runs one request: its data, its exception code, or why it got neither."""
    try:
        rr = call(*args, **kwargs)
    except ModbusException as exc:
        return {"error": f"{type(exc).__name__}: {exc}"}
    if rr.isError():
        return {"exception_code": int(rr.exception_code)}
    out: dict = {}
    if getattr(rr, "registers", None):
        out["registers"] = list(rr.registers)
    if getattr(rr, "bits", None):
        out["bits"] = list(rr.bits)
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("target", help="HOST:PORT")
    parser.add_argument("--unit", type=int, default=1, help="Modbus unit id (device_id)")
    parser.add_argument("--f32", type=int, action="append", default=[], help="holding register address of an f32")
    parser.add_argument("--u16", type=int, action="append", default=[], help="input register address of a u16")
    parser.add_argument("--coil", type=int, action="append", default=[], help="coil address")
    parser.add_argument("--write", type=int, help="holding register address to try one write_register on")
    parser.add_argument("--oversize", type=int, help="address to read 126 holding registers from")
    parser.add_argument("--bad-address", type=int, help="address with no registers, to read 2 from")
    args = parser.parse_args()
    if pymodbus.__version__ != PINNED:
        print(f"peer_client.py: needs pymodbus {PINNED}, found {pymodbus.__version__}", file=sys.stderr)
        return 2

    host, _, port = args.target.rpartition(":")
    client = ModbusTcpClient(host, port=int(port), timeout=2, retries=0)
    if not client.connect():
        print(f"peer_client.py: cannot connect to {args.target}", file=sys.stderr)
        return 1
    unit = args.unit
    dt = client.DATATYPE
    report: dict = {"pymodbus_version": pymodbus.__version__, "unit": unit, "reads": []}
    try:
        for address in args.f32:
            entry = {"table": "holding", "address": address, "count": 2}
            entry.update(answer(client.read_holding_registers, address, count=2, device_id=unit))
            if "registers" in entry:
                regs = entry["registers"]
                entry["float32"] = {
                    order: finite(client.convert_from_registers(regs, dt.FLOAT32, word_order=order))
                    for order in ("big", "little")
                }
            report["reads"].append(entry)
        for address in args.u16:
            entry = {"table": "input", "address": address, "count": 1}
            entry.update(answer(client.read_input_registers, address, count=1, device_id=unit))
            if "registers" in entry:
                entry["uint16"] = client.convert_from_registers(entry["registers"], dt.UINT16)
            report["reads"].append(entry)
        for address in args.coil:
            entry = {"table": "coil", "address": address, "count": 1}
            entry.update(answer(client.read_coils, address, count=1, device_id=unit))
            if "bits" in entry:
                entry["bits"] = entry["bits"][:1]  # pymodbus pads to a whole byte
            report["reads"].append(entry)

        if args.write is not None:
            current = answer(client.read_holding_registers, args.write, count=1, device_id=unit)
            value = current.get("registers", [0])[0]
            entry = {"address": args.write, "value": value, "exception_code": None}
            entry.update(answer(client.write_register, args.write, value, device_id=unit))
            report["write_register"] = entry

        if args.oversize is not None:
            entry = {"address": args.oversize, "count": 126}
            try:
                client.read_holding_registers(args.oversize, count=126, device_id=unit)
                entry["client_refused"] = None
            except (ValueError, ModbusException) as exc:
                entry["client_refused"] = f"{type(exc).__name__}: {exc}"
            request = ReadHoldingRegistersRequest(address=args.oversize, count=126, dev_id=unit)
            request.MAX_COUNT = 126  # this one request only; see the module doc
            entry.update(answer(client.execute, False, request))
            report["oversize_read"] = entry

        if args.bad_address is not None:
            entry = {"address": args.bad_address, "count": 2}
            entry.update(answer(client.read_holding_registers, args.bad_address, count=2, device_id=unit))
            report["bad_address_read"] = entry
    finally:
        client.close()
    print(json.dumps(report, sort_keys=True))
    return 0


if __name__ == "__main__":
    sys.exit(main())
