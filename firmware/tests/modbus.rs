//! The Modbus RTU slave against a reference model, on random traffic: good
//! and damaged requests for this unit, other units and broadcast, every
//! function code, random lengths and bytes, pauses inside frames (below
//! and above 1.5 characters, and long enough to split a frame in two), and
//! polls at random moments. The model is written from the rules of the
//! module doc (Modbus over Serial Line V1.02 section 2.5.1.1, Modbus
//! Application Protocol V1.1b3 sections 6.4 and 7; docs/REFERENCES.md §20),
//! not from the code: it delimits frames by the silences of the generated
//! timeline and decides each answer. Every answer the slave gives must be
//! the model's, byte for byte, CRC included (the `crc` crate's
//! CRC-16/MODBUS, §20.1), and nothing may panic.

use fringe_firmware::modbus::{RtuSlave, SerialLine, Timing, MAX_ADU};
use fringe_registers::MAP_LEN;
use proptest::prelude::*;

const CRC: crc::Crc<u16> = crc::Crc::<u16>::new(&crc::CRC_16_MODBUS);

fn registers() -> [u16; MAP_LEN] {
    core::array::from_fn(|i| 0xA000 + 7 * i as u16)
}

fn with_crc(body: &[u8]) -> Vec<u8> {
    let mut v = body.to_vec();
    v.extend_from_slice(&CRC.checksum(body).to_le_bytes());
    v
}

/// One frame of traffic as the master (or another device) puts it on the line.
#[derive(Debug, Clone)]
struct Sent {
    bytes: Vec<u8>,
    /// Silence before each byte after the first, microseconds.
    pauses: Vec<u64>,
}

fn request() -> impl Strategy<Value = Vec<u8>> {
    let unit = prop_oneof![Just(1u8), Just(1), Just(1), Just(0), Just(2), any::<u8>()];
    let func = prop_oneof![Just(4u8), Just(4), Just(3), Just(6), Just(16), any::<u8>()];
    let read = (unit.clone(), func.clone(), 0u16..40, 0u16..140).prop_map(|(u, f, a, c)| {
        let mut b = vec![u, f];
        b.extend_from_slice(&a.to_be_bytes());
        b.extend_from_slice(&c.to_be_bytes());
        with_crc(&b)
    });
    let odd = (unit, func, proptest::collection::vec(any::<u8>(), 0..12)).prop_map(|(u, f, d)| {
        let mut b = vec![u, f];
        b.extend(d);
        with_crc(&b)
    });
    let noise = proptest::collection::vec(any::<u8>(), 0..20);
    let long = proptest::collection::vec(any::<u8>(), MAX_ADU - 2..MAX_ADU + 4);
    prop_oneof![6 => read, 2 => odd, 1 => noise, 1 => long]
}

fn sent(t: Timing) -> impl Strategy<Value = Sent> {
    let pause = prop_oneof![
        20 => Just(0u64),
        2 => 0..=u64::from(t.t15_us),
        // The boundaries themselves.
        1 => Just(u64::from(t.t15_us)),
        1 => Just(u64::from(t.t15_us) + 1),
        1 => Just(u64::from(t.t35_us) - 1),
        1 => Just(u64::from(t.t35_us)),
        1 => u64::from(t.t15_us) + 1..u64::from(t.t35_us),
        1 => u64::from(t.t35_us)..u64::from(t.t35_us) * 2,
    ];
    (
        request(),
        any::<bool>(),
        proptest::collection::vec(pause, MAX_ADU + 4),
    )
        .prop_map(|(mut bytes, flip, pauses)| {
            if flip && !bytes.is_empty() {
                let i = pauses[0] as usize % bytes.len();
                bytes[i] ^= 0x10;
            }
            let n = bytes.len().saturating_sub(1);
            Sent {
                pauses: pauses[..n].to_vec(),
                bytes,
            }
        })
}

/// The model: the answer to one delimited frame (`damaged`: a silence
/// above t1.5 inside it).
fn model_answer(frame: &[u8], damaged: bool) -> Option<Vec<u8>> {
    let n = frame.len();
    if damaged || !(4..=MAX_ADU).contains(&n) {
        return None;
    }
    let (body, crc) = frame.split_at(n - 2);
    if CRC.checksum(body) != u16::from_le_bytes([crc[0], crc[1]]) {
        return None;
    }
    let (unit, func) = (body[0], body[1]);
    if unit != 1 || func >= 0x80 {
        return None;
    }
    let exception = |code: u8| Some(with_crc(&[1, func | 0x80, code]));
    if func != 4 {
        return exception(1);
    }
    if n != 8 {
        return exception(3);
    }
    let addr = usize::from(u16::from_be_bytes([body[2], body[3]]));
    let count = usize::from(u16::from_be_bytes([body[4], body[5]]));
    if count == 0 || count > 125 {
        return exception(3);
    }
    if addr + count > MAP_LEN {
        return exception(2);
    }
    let mut out = vec![1, 4, (2 * count) as u8];
    for w in &registers()[addr..addr + count] {
        out.extend_from_slice(&w.to_be_bytes());
    }
    Some(with_crc(&out))
}

/// The model's state: the frame being received and the answer waiting
/// for a poll, which is not given while a frame comes in, and is dropped
/// when a frame of 4 characters or more (any unit, good or garbled) has
/// come since its request: the master has gone on, and an answer then
/// would go out over the next request or another unit's answer (Modbus
/// over Serial Line V1.02 section 2.1, one master, which starts no frame
/// while it waits for an answer).
#[derive(Default)]
struct Model {
    frame: Vec<u8>,
    damaged: bool,
    last_us: u64,
    pending: Option<Vec<u8>>,
    /// Answers dropped so.
    dropped: u32,
}

impl Model {
    fn end_frame(&mut self) {
        if !self.frame.is_empty() {
            if self.frame.len() >= 4 && self.pending.take().is_some() {
                self.dropped += 1;
            }
            if let Some(a) = model_answer(&self.frame, self.damaged) {
                self.pending = Some(a);
            }
        }
        self.frame.clear();
        self.damaged = false;
    }

    /// A byte at `at` after `silence` microseconds without one.
    fn receive(&mut self, t: Timing, at: u64, silence: u64, b: u8) {
        if silence >= u64::from(t.t35_us) {
            self.end_frame();
        } else if silence > u64::from(t.t15_us) && !self.frame.is_empty() {
            self.damaged = true;
        }
        self.frame.push(b);
        self.last_us = at;
    }

    fn poll(&mut self, t: Timing, now: u64) -> Option<Vec<u8>> {
        if !self.frame.is_empty() && now >= self.last_us + u64::from(t.t35_us) {
            self.end_frame();
        }
        if !self.frame.is_empty() {
            return None;
        }
        self.pending.take()
    }
}

proptest! {
    #![proptest_config(fringe_testkit::proptest_config(256, 0x0D_B05))]

    #[test]
    fn answers_are_the_models_on_random_traffic(
        baud in prop_oneof![Just(9600u32), Just(19_200), Just(115_200)],
        frames in proptest::collection::vec(sent(Timing::for_baud(19_200)), 1..12),
        polls in proptest::collection::vec(any::<u16>(), 31),
    ) {
        let line = SerialLine { baud, ..SerialLine::DEFAULT };
        let t = line.timing();
        let c = u64::from(t.char_us);
        // The generated pauses are for 19200 baud; scaled to this one.
        let scale = |p: u64| p * u64::from(t.t35_us) / 2006;
        let mut s = RtuSlave::new(&line).unwrap();
        let mut m = Model::default();
        let mut now = 1_000_000u64;
        let mut k = 0usize;
        let mut draw = || {
            k += 1;
            u64::from(polls[k % polls.len()])
        };
        let mut answers = 0usize;
        for f in &frames {
            // At least t3.5 between frames (exactly t3.5 now and then).
            // Polls inside this frame or not (an answer still waiting from
            // the frame before waits for this one's end, which decides).
            let mid = draw() % 3 == 0;
            let mut silence = u64::from(t.t35_us) + if draw() % 3 == 0 { 0 } else { draw() % 3000 };
            for (i, &b) in f.bytes.iter().enumerate() {
                if i > 0 {
                    silence = scale(f.pauses[i - 1]);
                }
                now += silence + c;
                s.receive(now, b);
                m.receive(t, now, silence, b);
                // Polls at random moments before the next byte (which may
                // be after this frame's end, t3.5 on).
                let next = f.pauses.get(i).map_or(u64::from(t.t35_us), |&p| scale(p) + c);
                if mid && draw() % 3 == 0 {
                    let at = now + draw() % next;
                    let got = s.poll(at, registers).map(<[u8]>::to_vec);
                    prop_assert_eq!(&got, &m.poll(t, at), "poll at {} us", at);
                    answers += usize::from(got.is_some());
                }
            }
            // Mostly a poll after the frame (exactly at its end now and
            // then); sometimes none, so the next frame's first byte ends
            // it, and the next frame decides on a request not yet answered.
            if draw() % 4 != 0 {
                let at = now + u64::from(t.t35_us) + if draw() % 3 == 0 { 0 } else { draw() % 500 };
                let got = s.poll(at, registers).map(<[u8]>::to_vec);
                prop_assert_eq!(&got, &m.poll(t, at), "poll at {} us", at);
                answers += usize::from(got.is_some());
            }
        }
        now += 10 * u64::from(t.t35_us);
        let got = s.poll(now, registers).map(<[u8]>::to_vec);
        prop_assert_eq!(&got, &m.poll(t, now), "last poll");
        answers += usize::from(got.is_some());
        let counts = s.counters();
        prop_assert_eq!((counts.answered + counts.exceptions) as usize, answers);
        prop_assert_eq!(counts.late, m.dropped);
    }
}
