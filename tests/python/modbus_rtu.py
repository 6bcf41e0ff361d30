"""Reads a Fringe device's input registers over Modbus RTU with pymodbus's
serial client (a master written by others, as a plant's scripts would use),
on the pseudo-terminal of the QEMU board's UART1.

Usage: python modbus_rtu.py PTY UNIT READINGS [WRONG_UNIT]

Prints one JSON object:
- "reads": whole-map reads (25 registers in one request) until READINGS
  different readings (by counter) were seen, each with its registers and
  the float32, uint32 and int16 values decoded by pymodbus's own converter;
- "round_trip_s": the slowest of those reads, seconds;
- "wrong_unit": what the first answered of PROBES reads addressed to unit
  WRONG_UNIT (default UNIT + 1) got (null: none was answered);
- "past_end_exception", "holding_exception": the exception codes of a read
  past the map's end and of a read of holding registers (function 03);
- "bad_crc_answer": the bytes that came back within "silence_s" seconds of
  each of PROBES requests whose CRC was altered (empty: none), and "after_bad_crc_ok":
  whether a good request after them was answered (PROBES tries,
  each with pymodbus's retries).

Waits are bounded: a request unanswered within its timeout counts as
unanswered; QEMU notices a new pty client only about once a second, so the
first read is repeated until it is answered (30 s at most).
"""

import faulthandler
import json
import math
import sys
import time

from pymodbus.client import ModbusSerialClient
from pymodbus.exceptions import ModbusException
from pymodbus.framer.rtu import FramerRTU

TIMEOUT_S = 1.0
# QEMU's pty delivers a request's bytes to the emulated UART one main-loop
# turn apart, and now and then that gap reaches the 3.5-character frame end
# in the board's virtual time: the request is split, its halves dropped (bad
# CRC) and the read unanswered. pymodbus repeats it; the test reports how
# often that happened (the board's counters).
RETRIES = 3
MAX_FAILED = 3
PROBES = 8


def decode(client, regs):
    dt = client.DATATYPE

    def f32(words):
        # JSON has no NaN: a "no valid value" float is written as null.
        value = client.convert_from_registers(words, dt.FLOAT32)
        return None if math.isnan(value) else value

    return {
        "registers": regs,
        "moisture_pct": f32(regs[0:2]),
        "uncertainty_pct": f32(regs[2:4]),
        "temperature_c": f32(regs[4:6]),
        "status": regs[6],
        "counter": client.convert_from_registers(regs[7:9], dt.UINT32),
        "age_s": regs[9],
        "boot": regs[10],
        "flags": regs[11],
        "known_value": f32(regs[12:14]),
        "version": regs[14],
        "basis": regs[15],
        "scaled_moisture": client.convert_from_registers([regs[20]], dt.INT16),
        "scaled_uncertainty": client.convert_from_registers([regs[21]], dt.INT16),
        "scaled_temperature": client.convert_from_registers([regs[22]], dt.INT16),
    }


def read(client, address, count, unit):
    """The answer, or None when nothing (valid) came back in time."""
    try:
        rr = client.read_input_registers(address, count=count, device_id=unit)
    except ModbusException:
        return None
    return rr


def main(pty, unit, readings, wrong_unit):
    # Every wait below is bounded; should one not be after all, the stacks
    # go to stderr and the script exits instead of holding the test.
    faulthandler.dump_traceback_later(150, exit=True)
    out = {}
    # The device's line is 19200 8E1, but a pseudo-terminal carries bytes,
    # not characters: Linux refuses even parity on a pty (EINVAL) and QEMU's
    # UART models no parity, so the port is opened without it.
    client = ModbusSerialClient(
        pty, baudrate=19200, bytesize=8, parity="N", stopbits=1, timeout=TIMEOUT_S, retries=RETRIES
    )
    if not client.connect():
        raise SystemExit(f"cannot open {pty}")
    deadline = time.monotonic() + 30
    while True:
        rr = read(client, 0, 25, unit)
        if rr is not None and not rr.isError():
            break
        if time.monotonic() > deadline:
            raise SystemExit(f"unit {unit} on {pty} did not answer within 30 s")

    # A read whose request and every repeat were split by the pty timing
    # (above) is read again, MAX_FAILED times at most in all: once, in a
    # full run under load, four tries in a row were split.
    reads, counters, slowest, failed = [], set(), 0.0, 0
    deadline = time.monotonic() + 60
    while len(counters) < readings:
        if time.monotonic() > deadline:
            raise SystemExit(f"only {len(counters)} readings seen in 60 s")
        t0 = time.monotonic()
        rr = read(client, 0, 25, unit)
        slowest = max(slowest, time.monotonic() - t0)
        if rr is None or rr.isError():
            failed += 1
            if failed > MAX_FAILED:
                raise SystemExit(f"read of the map failed {failed} times, the last: {rr}")
            continue
        d = decode(client, list(rr.registers))
        reads.append(d)
        counters.add((d["boot"], d["counter"]))
    out["reads"] = reads
    out["failed_reads"] = failed
    out["round_trip_s"] = slowest

    # The probes that must stay unanswered are sent PROBES times each: a
    # probe split by the pty timing above is dropped as damaged rather than
    # recognised, and the board's counters should see at least one whole
    # (three were not enough once in a full run under load: all three split).
    client.transaction.retries = 0
    wrong = [read(client, 0, 1, wrong_unit) for _ in range(PROBES)]
    client.transaction.retries = RETRIES
    answered = [w for w in wrong if w is not None]
    out["wrong_unit"] = str(answered[0]) if answered else None
    bad = read(client, 20, 10, unit)
    out["past_end_exception"] = getattr(bad, "exception_code", None)
    try:
        holding = client.read_holding_registers(0, count=2, device_id=unit)
    except ModbusException:
        holding = None
    out["holding_exception"] = getattr(holding, "exception_code", None)

    # A request with its CRC altered (pymodbus's own CRC, which it returns
    # with the byte sent first as the high byte; one bit of it flipped): the
    # device must stay silent; the good request after it is answered.
    body = bytes([unit, 0x04, 0x00, 0x00, 0x00, 0x19])
    crc = FramerRTU.compute_CRC(body).to_bytes(2, "big")
    frame = body + bytes([crc[0] ^ 0x01, crc[1]])
    port = client.socket
    port.reset_input_buffer()
    got = b""
    silence_s = 1.0
    for _ in range(PROBES):
        port.write(frame)
        port.flush()
        end = time.monotonic() + silence_s
        while time.monotonic() < end:
            port.timeout = max(0.0, end - time.monotonic())
            got += port.read(256)
    out["bad_crc_answer"] = got.hex()
    out["silence_s"] = silence_s
    ok = False
    for _ in range(PROBES):
        after = read(client, 0, 25, unit)
        ok = after is not None and not after.isError()
        if ok:
            break
    out["after_bad_crc_ok"] = ok
    client.close()
    print(json.dumps(out, allow_nan=False))


if __name__ == "__main__":
    unit = int(sys.argv[2])
    wrong_unit = int(sys.argv[4]) if len(sys.argv) > 4 else unit + 1
    main(sys.argv[1], unit, int(sys.argv[3]), wrong_unit)
