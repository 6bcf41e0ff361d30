//! Fuzz target for the firmware's Modbus RTU slave
//! (`fringe_firmware::modbus::RtuSlave`): arbitrary bytes as received
//! frames.
//!
//! The first input byte holds flags, the second picks the unit id:
//! - bit 0 set: the rest is one frame, sent back to back; bit 1 set, its
//!   first byte becomes the slave's unit id, bit 2 set, the right CRC is
//!   appended (so that random bytes get past the CRC into the PDU). The
//!   answer must be exactly what the module's table says (checked against
//!   `fringe_registers::read_input_registers`, the register map's own rule).
//! - bit 0 clear: the rest is a stream of (gap, byte) pairs, gap in eighths
//!   of a character (255: a line error instead of the byte), polled after
//!   each; every answer must be well formed (unit id, function or its
//!   exception, CRC, length) and the counters consistent.
#![no_main]

use crc::{Crc, CRC_16_MODBUS};
use fringe_firmware::modbus::{Parity, RtuSlave, SerialLine, MAX_ADU, READ_INPUT_REGISTERS};
use fringe_registers::{read_input_registers, MAP_LEN};
use libfuzzer_sys::fuzz_target;

const CRC16: Crc<u16> = Crc::<u16>::new(&CRC_16_MODBUS);

fn map() -> [u16; MAP_LEN] {
    core::array::from_fn(|i| 0xA500u16.wrapping_add(i as u16 * 0x0101))
}

/// Checks the envelope every answer has: the slave's unit, the request's
/// function (or its exception form), a right CRC, a length that fits.
fn well_formed(unit: u8, resp: &[u8]) {
    assert!(
        resp.len() >= 5 && resp.len() <= MAX_ADU,
        "length {}",
        resp.len()
    );
    assert_eq!(resp[0], unit, "unit id");
    let (body, crc) = resp.split_at(resp.len() - 2);
    assert_eq!(
        CRC16.checksum(body).to_le_bytes(),
        [crc[0], crc[1]],
        "answer CRC"
    );
    if resp[1] & 0x80 != 0 {
        assert_eq!(resp.len(), 5, "exception length");
        assert!((1..=3).contains(&resp[2]), "exception code {}", resp[2]);
    } else {
        assert_eq!(
            resp[1], READ_INPUT_REGISTERS,
            "only 04 is answered with data"
        );
        assert_eq!(usize::from(resp[2]) + 5, resp.len(), "byte count");
        assert!(resp[2] % 2 == 0 && resp[2] > 0);
    }
}

/// What the module's table says the answer to `frame` is.
fn expected(unit: u8, frame: &[u8]) -> Option<Vec<u8>> {
    if frame.len() < 4 || frame.len() > MAX_ADU {
        return None;
    }
    let (body, crc) = frame.split_at(frame.len() - 2);
    if CRC16.checksum(body).to_le_bytes() != [crc[0], crc[1]] {
        return None;
    }
    let (u, f) = (body[0], body[1]);
    if u != unit || f >= 0x80 {
        return None;
    }
    let exception = |code: u8| vec![unit, f | 0x80, code];
    let mut out = if f != READ_INPUT_REGISTERS {
        exception(1)
    } else if frame.len() != 8 {
        exception(3)
    } else {
        let addr = u16::from_be_bytes([body[2], body[3]]);
        let count = u16::from_be_bytes([body[4], body[5]]);
        let m = map();
        match read_input_registers(&m, addr, count) {
            Ok(words) => {
                let mut v = vec![unit, f, (words.len() * 2) as u8];
                for w in words {
                    v.extend_from_slice(&w.to_be_bytes());
                }
                v
            }
            Err(e) => exception(e as u8),
        }
    };
    out.extend_from_slice(&CRC16.checksum(&out).to_le_bytes());
    Some(out)
}

fn one_frame(slave: &mut RtuSlave, unit: u8, flags: u8, rest: &[u8]) {
    let mut frame = rest.to_vec();
    if flags & 2 != 0 {
        if let Some(b) = frame.first_mut() {
            *b = unit;
        }
    }
    if flags & 4 != 0 {
        let c = CRC16.checksum(&frame).to_le_bytes();
        frame.extend_from_slice(&c);
    }
    let t = slave.timing();
    let mut now = 10_000u64;
    for &b in &frame {
        now += u64::from(t.char_us);
        slave.receive(now, b);
    }
    assert_eq!(
        slave.poll(now + u64::from(t.t35_us) - 1, map),
        None,
        "answered early"
    );
    let got = slave
        .poll(now + u64::from(t.t35_us), map)
        .map(<[u8]>::to_vec);
    if let Some(r) = &got {
        well_formed(unit, r);
    }
    assert_eq!(got, expected(unit, &frame), "answer to {frame:02x?}");
    let c = slave.counters();
    assert_eq!(c.frames, u32::from(!frame.is_empty()));
}

fn stream(slave: &mut RtuSlave, unit: u8, rest: &[u8]) {
    let t = slave.timing();
    let mut now = 10_000u64;
    let mut answers = 0u32;
    for pair in rest.chunks_exact(2) {
        let (gap, byte) = (pair[0], pair[1]);
        now += u64::from(t.char_us) + u64::from(t.char_us) * u64::from(gap) / 8;
        if gap == 255 {
            slave.line_error(now);
        } else {
            slave.receive(now, byte);
        }
        if let Some(r) = slave.poll(now, map) {
            well_formed(unit, r);
            answers += 1;
        }
    }
    if let Some(d) = slave.frame_deadline_us() {
        assert!(d > now);
        if let Some(r) = slave.poll(d, map) {
            well_formed(unit, r);
            answers += 1;
        }
        assert_eq!(slave.frame_deadline_us(), None, "the frame ended");
    }
    let c = slave.counters();
    assert_eq!(c.answered + c.exceptions, answers, "every answer counted");
    let outcomes = c.bad_crc + c.damaged + c.other_unit + c.broadcast + answers;
    assert!(outcomes <= c.frames, "{c:?}");
}

fuzz_target!(|data: &[u8]| {
    let [flags, pick, rest @ ..] = data else {
        return;
    };
    let unit = 1 + pick % 247;
    let baud = fringe_firmware::modbus::BAUD_RATES[usize::from(flags >> 5)];
    let line = SerialLine {
        unit_id: unit,
        baud,
        parity: Parity::Even,
    };
    let mut slave = RtuSlave::new(&line).expect("valid settings");
    if flags & 1 != 0 {
        one_frame(&mut slave, unit, *flags, rest);
    } else {
        stream(&mut slave, unit, rest);
    }
});
