//! Fringe firmware on QEMU's mps2-an386 (Cortex-M4F): the firmware core's
//! [`Device`] with the simulated front end, on the board's UART0, SysTick
//! clock and emulated NOR flash. Registers are touched only in this crate,
//! and only in its driver modules; `main` wires them to the core.
//!
//! Boot with `cargo xtask qemu` (UART0 on a pseudo-terminal) and talk to it
//! with `fringe monitor --port <pty>`.
#![no_std]
#![no_main]

mod clock;
mod diag;
mod norflash;
mod panic;
mod retained;
mod uart;

use core::mem::MaybeUninit;

use cortex_m_rt::{entry, exception};
use fringe_firmware::hal::NullOutput;
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
    // SAFETY: the handler (`DefaultHandler` below) only touches the RX ring.
    unsafe { cortex_m::peripheral::NVIC::unmask(Irq::Uart0Rx) };

    let mut watchdog = clock::SoftWatchdog;
    fringe_firmware::Watchdog::kick(&mut watchdog);
    let dev = start(cold, reset_cause);
    dev.set_diagnostics(Diagnostics {
        stack_free_bytes: Some(diag::stack_free_bytes()),
        reading_cost: None,
    });

    // Cost of the reading in progress, cycles outside the front end.
    let mut work: u64 = 0;
    let mut last_cost: Option<u32> = None;
    let mut rx = [0u8; 64];
    loop {
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
        if n == 0 && !uart.rx_waiting() {
            // Nothing to do until the next tick or byte.
            cortex_m::asm::wfi();
        }
    }
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
    }
}
