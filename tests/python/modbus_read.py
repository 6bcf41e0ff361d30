"""Reads a Fringe gateway's Modbus registers with pymodbus, a client
written by others, as a plant's scripts would.

Usage: python modbus_read.py HOST PORT UNIT [UNIT ...]
Prints one JSON object: for each unit the 25 input registers read in one
request, the float32 values decoded high word first with pymodbus's own
converter, and the scaled int16 block; then the answers to a read past the
map's end and to an unknown unit (unit 247).
"""

import json
import math
import sys

from pymodbus.client import ModbusTcpClient


def decode(client, regs):
    dt = client.DATATYPE.FLOAT32

    def f32(words, datatype):
        # JSON has no NaN: a "no valid value" float is written as null.
        value = client.convert_from_registers(words, datatype)
        return None if math.isnan(value) else value

    return {
        "registers": regs,
        "moisture_pct": f32(regs[0:2], dt),
        "uncertainty_pct": f32(regs[2:4], dt),
        "temperature_c": f32(regs[4:6], dt),
        "status": regs[6],
        "counter": client.convert_from_registers(regs[7:9], client.DATATYPE.UINT32),
        "age_s": regs[9],
        "boot": regs[10],
        "known_value": f32(regs[12:14], dt),
        "version": regs[14],
        "basis": regs[15],
        "scaled_moisture": client.convert_from_registers([regs[20]], client.DATATYPE.INT16),
    }


def main(host, port, units):
    out = {"units": {}}
    with ModbusTcpClient(host, port=port, timeout=5, retries=1) as client:
        for unit in units:
            rr = client.read_input_registers(0, count=25, device_id=unit)
            if rr.isError():
                out["units"][str(unit)] = {"error": str(rr)}
            else:
                out["units"][str(unit)] = decode(client, list(rr.registers))
        bad = client.read_input_registers(20, count=10, device_id=units[0])
        out["past_end_exception"] = getattr(bad, "exception_code", None)
        unknown = client.read_input_registers(0, count=2, device_id=247)
        out["unknown_unit_exception"] = getattr(unknown, "exception_code", None)
        holding = client.read_holding_registers(0, count=2, device_id=units[0])
        out["holding_exception"] = getattr(holding, "exception_code", None)
    print(json.dumps(out, allow_nan=False))


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]), [int(u) for u in sys.argv[3:]])
