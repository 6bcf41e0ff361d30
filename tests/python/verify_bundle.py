"""An audit bundle checked by a reader that shares no code with fringe.

Reads BUNDLE/manifest.json and BUNDLE/records.jsonl with nothing but the
Python standard library (hashlib, json, struct) and checks, from the format
written down in host/SCHEMA.md and host/src/store/chain.rs:

- every file listed in the manifest has the listed SHA-256 and size;
- the records form the chain from the manifest's anchor_hash to its
  last_hash, position by position, each hash recomputed as
  SHA-256("fringe-chain/1" || prev || position u64 LE || table tag u8 || row),
  the row being the record's values in the manifest's column order, each
  by storage class (NULL 0x00; INTEGER 0x01 i64 LE; REAL 0x02 f64 LE;
  TEXT 0x03 u32 LE length + UTF-8; BLOB 0x04 u32 LE length + bytes).

Prints one JSON object: {"ok": bool, "records": n, "problems": [...]}.
Usage: python verify_bundle.py BUNDLE
"""

import hashlib
import json
import struct
import sys
from pathlib import Path

TABLE_TAGS = {
    "devices": 1,
    "readings": 2,
    "events": 3,
    "calibrations": 4,
    "lab_samples": 5,
    "reference_checks": 6,
}


def encode(value):
    if value is None:
        return b"\x00"
    if isinstance(value, bool):
        raise ValueError("booleans are not a storage class")
    if isinstance(value, int):
        return b"\x01" + struct.pack("<q", value)
    if isinstance(value, float):
        return b"\x02" + struct.pack("<d", value)
    if isinstance(value, str):
        raw = value.encode("utf-8")
        return b"\x03" + struct.pack("<I", len(raw)) + raw
    if isinstance(value, dict) and set(value) == {"hex"}:
        raw = bytes.fromhex(value["hex"])
        return b"\x04" + struct.pack("<I", len(raw)) + raw
    raise ValueError(f"value {value!r} has no storage class")


def main(bundle):
    bundle = Path(bundle)
    manifest = json.loads((bundle / "manifest.json").read_text(encoding="utf-8"))
    problems = []
    for f in manifest["files"]:
        data = (bundle / f["name"]).read_bytes()
        if hashlib.sha256(data).hexdigest() != f["sha256"] or len(data) != f["bytes"]:
            problems.append(f"{f['name']}: SHA-256 or size differs from the manifest")
    prev = bytes.fromhex(manifest["anchor_hash"])
    expected_position = manifest["first_position"]
    n = 0
    lines = (bundle / "records.jsonl").read_text(encoding="utf-8").splitlines()
    for line_no, line in enumerate(lines, start=1):
        rec = json.loads(line)
        pos, table = rec["position"], rec["table"]
        if pos != expected_position:
            problems.append(f"records.jsonl:{line_no}: position {pos}, expected {expected_position}")
        columns = manifest["columns"][table]
        row = b"".join(encode(rec["values"][c]) for c in columns)
        h = hashlib.sha256(
            b"fringe-chain/1" + prev + struct.pack("<Q", pos) + bytes([TABLE_TAGS[table]]) + row
        ).digest()
        if h.hex() != rec["hash"]:
            problems.append(f"records.jsonl:{line_no}: position {pos} ({table}) does not hash to its hash")
        prev = bytes.fromhex(rec["hash"])
        expected_position = pos + 1
        n += 1
    if prev.hex() != manifest["last_hash"]:
        problems.append("the records do not end at the manifest's last_hash")
    if expected_position - 1 != manifest["last_position"]:
        problems.append("the records do not end at the manifest's last_position")
    print(json.dumps({"ok": not problems, "records": n, "problems": problems}))


if __name__ == "__main__":
    main(sys.argv[1])
