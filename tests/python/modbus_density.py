"""Writes a bulk density to a Fringe gateway's unit over Modbus TCP with
pymodbus, as a plant's PLC or script would: the float32 in holding
registers 0-1 (high word first, pymodbus's own converter), function 16.

Usage: python modbus_density.py HOST PORT UNIT KG_M3 [SOURCE_IP]
SOURCE_IP: the local address to write from (e.g. 127.0.0.2, another
loopback address, to be a PLC the gateway does not list).
Prints one JSON object: the write's exception code (null when taken), the
registers written, and the density read back with function 03 (null when
NaN or when the read was refused, with its exception code).
"""

import json
import math
import sys

from pymodbus.client import ModbusTcpClient


def main(host, port, unit, kg_m3, source_ip):
    out = {}
    source = (source_ip, 0) if source_ip else None
    with ModbusTcpClient(host, port=port, timeout=5, retries=1, source_address=source) as c:
        if not c.connected:
            raise SystemExit(f"cannot connect to {host}:{port} from {source_ip}")
        words = c.convert_to_registers(kg_m3, c.DATATYPE.FLOAT32)
        out["registers"] = words
        w = c.write_registers(0, words, device_id=unit)
        out["write_exception"] = getattr(w, "exception_code", None) if w.isError() else None
        r = c.read_holding_registers(0, count=2, device_id=unit)
        if r.isError():
            out["read_exception"] = getattr(r, "exception_code", None)
            out["read_back"] = None
        else:
            v = c.convert_from_registers(list(r.registers), c.DATATYPE.FLOAT32)
            out["read_exception"] = None
            out["read_back"] = None if math.isnan(v) else v
    print(json.dumps(out, allow_nan=False))


if __name__ == "__main__":
    main(
        sys.argv[1],
        int(sys.argv[2]),
        int(sys.argv[3]),
        float(sys.argv[4]),
        sys.argv[5] if len(sys.argv) > 5 else None,
    )
