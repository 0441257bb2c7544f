"""A pymodbus Modbus TCP server for leaktally's interoperability tests.

    python peer_server.py [--port N]

Serves one device (unit id 1) whose registers are laid out and encoded by
pymodbus 3.16.1, an independent Modbus implementation, so that the agent's
decoding is checked against someone else's encoder. It binds 127.0.0.1 (port
0, the default, lets the OS pick) and prints ``listening on 127.0.0.1:PORT``
once it accepts connections. SIGTERM or SIGINT stops it with exit code 0.

The register map (addresses 0-based, as on the wire) is printed as JSON on
the second line so that a test can see exactly what was served:

  holding 10-11  f32 3.75, high word first  (pymodbus SimData FLOAT32)
  holding 12-13  f32 -12.5, low word first  (convert_to_registers, "little")
  holding 16-17  marked invalid: reads there get exception 2 (IllegalDataAddress)
  holding 20     u16 42, so that 16-17 is a hole, not the end of the table
  input 0        u16 12000 (a 4000..20000 count loop at its 50 % point)
  input 1        i16 -2500
  coil 0         on; coils 1-15 off

Uses the SimData/SimDevice datastore that pymodbus 3.16 introduced, with
four separate tables (the tuple form), so that a holding and an input
register at the same address are different registers.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import signal
import sys

import pymodbus
from pymodbus.client import ModbusTcpClient
from pymodbus.server import ModbusTcpServer
from pymodbus.simulator import DataType, SimData, SimDevice

PINNED = "3.16.1"
UNIT_ID = 1

LEVEL_F32 = 3.75  # exactly representable: 0x40700000
PRESSURE_F32 = -12.5  # exactly representable: 0xC1480000
LEVEL_COUNTS = 12000
TRANSFER_I16 = -2500


def device() -> tuple[SimDevice, dict]:
    convert = ModbusTcpClient.convert_to_registers
    dt = ModbusTcpClient.DATATYPE
    pressure_regs = convert(PRESSURE_F32, dt.FLOAT32, word_order="little")
    transfer_regs = convert(TRANSFER_I16, dt.INT16)
    coils = [True] + [False] * 15
    holding = [
        SimData(10, values=LEVEL_F32, datatype=DataType.FLOAT32),
        SimData(12, values=pressure_regs, datatype=DataType.REGISTERS),
        SimData(16, count=2, datatype=DataType.INVALID),
        SimData(20, values=[42], datatype=DataType.REGISTERS),
    ]
    inputs = [SimData(0, values=[LEVEL_COUNTS, *transfer_regs], datatype=DataType.REGISTERS)]
    simdevice = SimDevice(
        id=UNIT_ID,
        simdata=(
            [SimData(0, values=coils, datatype=DataType.BITS)],
            [SimData(0, values=[False] * 16, datatype=DataType.BITS)],
            holding,
            inputs,
        ),
    )
    served = {
        "pymodbus_version": pymodbus.__version__,
        "unit_id": UNIT_ID,
        "holding": {
            "10": {"f32": LEVEL_F32, "word_order": "high_first"},
            "12": {"f32": PRESSURE_F32, "word_order": "low_first", "registers": pressure_regs},
            "16": {"invalid": 2},
            "20": {"u16": 42},
        },
        "input": {"0": {"u16": LEVEL_COUNTS}, "1": {"i16": TRANSFER_I16}},
        "coil": {"0": True},
    }
    return simdevice, served


async def serve(port: int) -> None:
    simdevice, served = device()
    server = ModbusTcpServer(simdevice, address=("127.0.0.1", port))
    await server.serve_forever(background=True)
    # pymodbus does not report the port it bound; its listener is an
    # asyncio.Server, whose sockets know.
    bound = server.transport.sockets[0].getsockname()[1]  # type: ignore[attr-defined]
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)
    print(f"listening on 127.0.0.1:{bound}", flush=True)
    print(json.dumps(served, sort_keys=True), flush=True)
    await stop.wait()
    await server.shutdown()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--port", type=int, default=0, help="TCP port on 127.0.0.1 (0: any free port)")
    args = parser.parse_args()
    if pymodbus.__version__ != PINNED:
        print(f"peer_server.py: needs pymodbus {PINNED}, found {pymodbus.__version__}", file=sys.stderr)
        return 2
    asyncio.run(serve(args.port))
    return 0


if __name__ == "__main__":
    sys.exit(main())
