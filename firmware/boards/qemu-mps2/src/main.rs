//! Fringe firmware on QEMU's mps2-an386 (Cortex-M4F): the firmware core's
//! [`Device`] with the simulated front end, on the board's UART0 (Fringe
//! protocol), UART1 (Modbus RTU slave, [`RtuSlave`]), SysTick clock and
//! emulated NOR flash. Registers are touched only in this crate,
//! and only in its driver modules; `main` wires them to the core.
//!
//! Boot with `cargo xtask qemu` (UART0 and UART1 on pseudo-terminals) and
//! talk to it with `fringe monitor --port <pty>`, or read its registers
//! with a Modbus RTU master on the second pty (unit 1 until the device's
//! Modbus settings say otherwise: `fringe device config set --modbus-unit`).
#![no_std]
#![no_main]

mod clock;
mod diag;
mod norflash;
mod panic;
mod retained;
mod rs485;
mod uart;

use core::mem::MaybeUninit;
use core::sync::atomic::{AtomicU32, Ordering};

use cortex_m_rt::{entry, exception};
use fringe_firmware::hal::NullOutput;
use fringe_firmware::modbus::{HalfDuplex, RtuSlave};
use fringe_firmware::protocol::ResetCause;
use fringe_firmware::sim::{Material, Scenario};
use fringe_firmware::{Booted, Device, DeviceConfig, Diagnostics, SimFrontend};

/// Serial number of the emulated device.
pub const SERIAL: &str = "QEMU-MPS2-0001";
/// Write key of the emulated device: a demo key, published in the README.
/// Never commission a real device with it.
pub const KEY: [u8; 32] = *b"fringe-qemu-mps2-demo-write-key!";
/// Seed of the simulated front end's noise.
const SIM_SEED: u64 = 0x00F1_A6E5;
/// UART0 baud divisor: 25 MHz / 115200.
const BAUDDIV: u32 = clock::CORE_HZ / 115_200;
/// Core cycles per microsecond.
const CYCLES_PER_US: u64 = clock::CORE_HZ as u64 / 1_000_000;

/// What the Modbus side did, read by `cargo xtask size` and the Modbus end
/// to end test through QEMU's monitor at this symbol's address (u32 words):
///
/// ```text
/// 0 answers sent          1 instructions the last answer cost (end of
/// 2 instructions from the last answered frame's gap     frame, CRC, map,
///   (t3.5 after its last byte) to its first byte sent   answer, its CRC)
/// 3 the largest such delay
/// 4.. the slave's counters: frames, bad CRC, damaged, other unit,
///     broadcast, answered with data, exceptions
/// 11 instructions since the service before the last answer, less the
///    simulated front end's own (what computing ADC samples costs here and
///    the ADC does on a real board): a bound on the firmware's work an
///    answer waits for, its own cost included
/// 12 the largest such bound
/// 13 the slave's requests dropped unanswered as late (a frame came
///    before the answer was sent: the master had gone on)
/// ```
///
/// Instructions under `-icount shift=0` (40 per core cycle).
#[no_mangle]
#[used]
pub static FRINGE_MODBUS: [AtomicU32; 14] = [const { AtomicU32::new(0) }; 14];

/// The world in front of the simulated window: a product of fixed
/// permittivity at 22 C (invented; "Harrowgate Mill line 2 dryer outlet").
fn scenario() -> Scenario {
    Scenario {
        material: Material::Liquid {
            eps_re: 12.5,
            eps_im: 1.8,
        },
        temperature_c: 22.0,
        ..Scenario::default()
    }
}

#[entry]
fn main() -> ! {
    diag::paint_stack();
    let cold = !retained::warm();
    let reset_cause = retained::take_cause();
    let cp =
        cortex_m::Peripherals::take().unwrap_or_else(|| panic!("core peripherals taken twice"));
    clock::init(cp.SYST);
    let mut uart = uart::Uart::init(BAUDDIV);
    cortex_m::peripheral::NVIC::unpend(Irq::Uart0Rx);
    cortex_m::peripheral::NVIC::unpend(Irq::Uart1Rx);
    // SAFETY: the handler (`DefaultHandler` below) only touches the RX rings.
    unsafe {
        cortex_m::peripheral::NVIC::unmask(Irq::Uart0Rx);
        cortex_m::peripheral::NVIC::unmask(Irq::Uart1Rx);
    }

    let mut watchdog = clock::SoftWatchdog;
    fringe_firmware::Watchdog::kick(&mut watchdog);
    let dev = start(cold, reset_cause);
    // The Modbus line as the device's settings say (checked when stored
    // and at boot; the defaults are unit 1, 19200 baud, 8E1).
    let mut line = dev.modbus_line();
    rs485::init(&line);
    let slave = SLAVE.take().write(match RtuSlave::new(&line) {
        Ok(s) => s,
        Err(e) => panic!("{e}"),
    });
    // Neither the UART nor the stand-in pin can fail on this board.
    let mut port = match HalfDuplex::new(rs485::Tx, rs485::NoDriverEnable::default()) {
        Ok(p) => p,
        Err(e) => panic!("{e}"),
    };
    dev.set_diagnostics(Diagnostics {
        stack_free_bytes: Some(diag::stack_free_bytes()),
        reading_cost: None,
    });

    // Cost of the reading in progress, cycles outside the front end.
    let mut work: u64 = 0;
    let mut last_cost: Option<u32> = None;
    let mut rx = [0u8; 64];
    let mut mark = (clock::cycles(), 0);
    loop {
        serve_modbus(slave, &mut port, dev, &mut mark);
        let n = uart.read_nonblocking(&mut rx);
        let readings = dev.readings_since_boot();
        let (fe_cycles, fe_calls) = {
            let fe = dev.frontend_mut();
            (fe.cycles, fe.acquisitions)
        };
        let t0 = clock::cycles();
        dev.poll_watched(
            clock::now_ms(),
            rx.get(..n).unwrap_or(&[]),
            &mut |bytes| {
                for &b in bytes {
                    uart.write_byte(b);
                }
            },
            &mut watchdog,
        );
        let spent = clock::cycles() - t0;
        let fe = dev.frontend_mut();
        if fe.acquisitions != fe_calls {
            work += spent.saturating_sub(fe.cycles - fe_cycles);
        }
        if dev.readings_since_boot() != readings {
            let instructions = clock::cycles_to_instructions(work);
            last_cost = Some(u32::try_from(instructions).unwrap_or(u32::MAX));
            work = 0;
        }
        dev.set_diagnostics(Diagnostics {
            stack_free_bytes: Some(diag::stack_free_bytes()),
            reading_cost: last_cost,
        });
        if dev.reboot_requested() {
            retained::reset(retained::Cause::Requested);
        }
        // A host changed the Modbus settings: the slave answers the new
        // unit id with the new frame gap from the next request on.
        let now_line = dev.modbus_line();
        if now_line != line && slave.reconfigure(&now_line).is_ok() {
            rs485::init(&now_line);
            line = now_line;
        }
        serve_modbus(slave, &mut port, dev, &mut mark);
        // Nothing to do until the next tick or byte. Not while a Modbus
        // frame is in progress: sleeping would let virtual time jump ahead
        // (`-icount sleep=off`) between two bytes of one frame.
        if n == 0
            && !uart.rx_waiting()
            && !rs485::rx_waiting()
            && slave.frame_deadline_us().is_none()
        {
            cortex_m::asm::wfi();
        }
    }
}

/// Hands the Modbus bytes received to the slave and sends its answer, if
/// any, with the registers of the device at this moment.
/// `mark` is the core cycles and the front end's cycles at the end of the
/// previous call.
fn serve_modbus(
    slave: &mut RtuSlave,
    port: &mut HalfDuplex<rs485::Tx, rs485::NoDriverEnable>,
    dev: &mut BoardDevice,
    mark: &mut (u64, u64),
) {
    let fe_now = dev.frontend_mut().cycles;
    let (mark_cycles, mark_fe) = core::mem::replace(mark, (clock::cycles(), fe_now));
    let now_us = clock::cycles() / CYCLES_PER_US;
    while let Some(rx) = rs485::take(now_us) {
        match rx {
            rs485::Rx::Byte(at_us, b) => slave.receive(at_us, b),
            rs485::Rx::Lost => slave.line_error(now_us),
        }
    }
    let c = slave.counters();
    let b = &FRINGE_MODBUS;
    for (i, v) in [
        c.frames,
        c.bad_crc,
        c.damaged,
        c.other_unit,
        c.broadcast,
        c.answered,
        c.exceptions,
    ]
    .into_iter()
    .enumerate()
    {
        b[4 + i].store(v, Ordering::Relaxed);
    }
    b[13].store(c.late, Ordering::Relaxed);
    let t0 = clock::cycles();
    let gap_ends_us = slave.frame_deadline_us();
    // (The time the bytes were taken to, `now_us` above: a byte that came
    // since is not fed yet, and an answer must not go out over it as if
    // the line were quiet.)
    let Some(answer) = slave.poll(now_us, || dev.modbus_registers(now_us / 1000)) else {
        return;
    };
    let t1 = clock::cycles();
    let instructions =
        |cycles: u64| u32::try_from(clock::cycles_to_instructions(cycles)).unwrap_or(u32::MAX);
    b[0].fetch_add(1, Ordering::Relaxed);
    b[1].store(instructions(t1 - t0), Ordering::Relaxed);
    if let Some(gap) = gap_ends_us {
        let late = instructions(t1.saturating_sub(gap * CYCLES_PER_US));
        b[2].store(late, Ordering::Relaxed);
        b[3].fetch_max(late, Ordering::Relaxed);
    }
    let own = (t1 - mark_cycles).saturating_sub(fe_now - mark_fe);
    b[11].store(instructions(own), Ordering::Relaxed);
    b[12].fetch_max(instructions(own), Ordering::Relaxed);
    // Infallible here (see `rs485`); a real board counts a failure.
    let _ = port.send(answer);
    *mark = (clock::cycles(), fe_now);
}

/// Boots the device into its static. Out of line, so that what boot holds
/// (the mounted storage, the front end before it moves) is off the stack
/// once the main loop runs.
///
/// Boot comes in two halves: the storage work first (deep calls, small
/// result), then the device is built and moved into its static, which
/// holds it on the stack once with nothing deep below. (A one-step
/// `Device::new` held it during all of the storage work: 10.6 KiB peak.)
#[inline(never)]
fn start(cold: bool, reset_cause: ResetCause) -> &'static mut BoardDevice {
    let mut config = DeviceConfig::new(SERIAL, KEY);
    config.simulated = true;
    // One record per poll: the Modbus slave is served between records, so
    // an answer waits for one record's work, not four.
    config.steps_per_poll = 1;
    let frontend = diag::Timed::new(SimFrontend::new(SIM_SEED, scenario()));
    let flash = norflash::RetainedFlash::take(cold);
    let booted = match Booted::mount(flash, config, reset_cause) {
        Ok(b) => b,
        Err(e) => panic!("boot failed: {e}"),
    };
    build(DEVICE.take(), booted, frontend)
}

/// Builds the device into its static slot.
#[inline(never)]
fn build(
    slot: &'static mut MaybeUninit<BoardDevice>,
    booted: Booted<norflash::RetainedFlash>,
    frontend: diag::Timed<SimFrontend>,
) -> &'static mut BoardDevice {
    slot.write(Device::from_booted(
        booted,
        frontend,
        NullOutput::default(),
        clock::now_ms(),
    ))
}

type BoardDevice = Device<diag::Timed<SimFrontend>, norflash::RetainedFlash, NullOutput>;

static DEVICE: Once<BoardDevice> = Once::new();
/// The Modbus slave (about 800 bytes, kept off the stack).
static SLAVE: Once<RtuSlave> = Once::new();

/// A static slot taken once at boot (for the device), handed out `&'static mut`.
struct Once<T> {
    taken: core::sync::atomic::AtomicBool,
    slot: core::cell::UnsafeCell<MaybeUninit<T>>,
}

// SAFETY: `take` hands out the only reference, once (checked by `taken`).
unsafe impl<T> Sync for Once<T> {}

impl<T> Once<T> {
    const fn new() -> Self {
        Self {
            taken: core::sync::atomic::AtomicBool::new(false),
            slot: core::cell::UnsafeCell::new(MaybeUninit::uninit()),
        }
    }

    /// The slot; panics on a second call.
    // The `taken` flag makes this the only `&mut` ever handed out.
    #[allow(clippy::mut_from_ref)]
    fn take(&'static self) -> &'static mut MaybeUninit<T> {
        if self.taken.swap(true, core::sync::atomic::Ordering::AcqRel) {
            panic!("static slot taken twice");
        }
        // SAFETY: first and only access (`taken` was false), so no other
        // reference to the slot exists.
        unsafe { &mut *self.slot.get() }
    }
}

/// Interrupt numbers used on this board.
#[derive(Clone, Copy)]
enum Irq {
    Uart0Rx = uart::UART0_RX_IRQ as isize,
    Uart1Rx = rs485::UART1_RX_IRQ as isize,
}

// SAFETY: the numbers are the board's interrupt lines (README.md of this crate).
unsafe impl cortex_m::interrupt::InterruptNumber for Irq {
    fn number(self) -> u16 {
        self as u16
    }
}

#[exception]
fn SysTick() {
    clock::on_systick();
}

/// Device interrupts arrive here (no PAC for this board): `irqn` is the
/// line number.
#[exception]
unsafe fn DefaultHandler(irqn: i16) {
    if irqn == uart::UART0_RX_IRQ as i16 {
        uart::on_rx_interrupt();
    } else if irqn == rs485::UART1_RX_IRQ as i16 {
        rs485::on_rx_interrupt();
    }
}
