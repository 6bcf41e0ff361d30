//! Fringe firmware on an STM32G474RE with the real front end: the
//! firmware core's [`Device`] on the drivers of `fringe-drivers`
//! (AD9959, ADS131M02, MAX31865, DAC161S997), USART1 for the Fringe
//! protocol, USART2 on RS-485 for the Modbus RTU slave (driver enable on
//! PA1), bank 2 of the internal flash as the device's NOR flash, the
//! independent watchdog, and the RTC.
//!
//! **Not run on hardware.** It builds and passes clippy; nothing here has
//! been on a board (README.md: pin table, bring-up checklist). Registers
//! are touched only through `embassy-stm32` and, for the reset cause, its
//! PAC (`retained`); `main` wires them to the core.
#![no_std]
#![no_main]

mod provision;
mod retained;
mod rs485;

use core::cell::RefCell;
use core::mem::MaybeUninit;

use cortex_m_rt::entry;
use embassy_embedded_hal::flash::partition::BlockingPartition;
use embassy_embedded_hal::shared_bus::blocking::spi::{SpiDevice, SpiDeviceWithConfig};
use embassy_stm32::flash::{Blocking, Flash};
use embassy_stm32::gpio::{AnyPin, Input, Level, Output, Pull, Speed};
use embassy_stm32::mode::Blocking as BlockingMode;
use embassy_stm32::rtc::{Rtc, RtcConfig};
use embassy_stm32::spi::{self, Spi};
use embassy_stm32::time::Hertz;
use embassy_stm32::usart::{self, BufferedUart, Uart};
use embassy_stm32::wdg::IndependentWatchdog;
use embassy_stm32::{bind_interrupts, peripherals, Peri};
use embassy_sync::blocking_mutex::raw::NoopRawMutex;
use embassy_sync::blocking_mutex::Mutex;
use embassy_time::{Delay, Instant};
use fringe_drivers::ad9959::Ad9959;
use fringe_drivers::ads131m02::Ads131m02;
use fringe_drivers::dac161s997::Dac161s997;
use fringe_drivers::frontend::{AnalogFrontend, LoopOutput, DESIGN};
use fringe_drivers::max31865::Max31865;
use fringe_firmware::modbus::{HalfDuplex, Parity, RtuSlave, SerialLine};
use fringe_firmware::protocol::ResetCause;
use fringe_firmware::{Booted, CurrentOutput, Device, DeviceConfig};

bind_interrupts!(struct Irqs {
    USART1 => usart::BufferedInterruptHandler<peripherals::USART1>;
    USART2 => rs485::RxInterrupt;
});

/// Fringe protocol baud rate (as the host's default).
const PROTOCOL_BAUD: u32 = 115_200;
/// Watchdog timeout, microseconds: a poll runs at most 4 records of 8 ms
/// each plus a flash page erase (about 20 ms on this part, from memory).
const WATCHDOG_US: u32 = 2_000_000;
/// Start of the device's storage in the flash (bank 2 of 512 KiB in
/// dual-bank mode, from memory of RM0440), as an offset from 0x0800_0000.
pub const STORAGE_OFFSET: u32 = 0x4_0000;
/// Storage size: bank 2 less its last 2 KiB page (the provisioning page).
pub const STORAGE_SIZE: u32 = 0x4_0000 - 0x800;

type Bus<T> = Mutex<NoopRawMutex, RefCell<T>>;
type Spi1 = Spi<'static, BlockingMode, spi::mode::Master>;
type Dev<'a> = SpiDevice<'a, NoopRawMutex, Spi1, Output<'static>>;
type DevCfg<'a> = SpiDeviceWithConfig<'a, NoopRawMutex, Spi1, Output<'static>>;
type Frontend = AnalogFrontend<
    Dev<'static>,
    Output<'static>,
    Output<'static>,
    Dev<'static>,
    Input<'static>,
    DevCfg<'static>,
    Delay,
    Output<'static>,
    Delay,
>;
type Storage = BlockingPartition<'static, NoopRawMutex, Flash<'static, Blocking>>;
type Loop = LoopOutput<DevCfg<'static>>;
type BoardDevice = Device<Frontend, Storage, Loop>;

/// The independent watchdog as the core's [`fringe_firmware::Watchdog`].
struct Iwdg(IndependentWatchdog<'static, peripherals::IWDG>);

impl fringe_firmware::Watchdog for Iwdg {
    fn kick(&mut self) {
        self.0.pet();
    }
}

/// The RS-485 transmitter: USART2's transmit side and the transceiver's
/// driver enable (PA1, high = driving the bus).
type Rs485 = HalfDuplex<usart::UartTx<'static, BlockingMode>, Output<'static>>;

fn spi_config(mode: spi::Mode, hz: u32) -> spi::Config {
    let mut c = spi::Config::default();
    c.mode = mode;
    c.frequency = Hertz(hz);
    c
}

/// A value in a `static` cell, handed out once as `&'static mut`.
macro_rules! singleton {
    ($t:ty = $e:expr) => {
        cortex_m::singleton!(: $t = $e).unwrap_or_else(|| panic!("singleton taken twice"))
    };
}

#[entry]
fn main() -> ! {
    let mut config = embassy_stm32::Config::default();
    {
        use embassy_stm32::rcc::*;
        // HSI16 / 4 * 85 / 2 = 170 MHz, the part's maximum with boost on.
        config.rcc.pll = Some(Pll {
            source: PllSource::HSI,
            prediv: PllPreDiv::DIV4,
            mul: PllMul::MUL85,
            divp: None,
            divq: None,
            divr: Some(PllRDiv::DIV2),
        });
        config.rcc.sys = Sysclk::PLL1_R;
        config.rcc.boost = true;
        // The RTC on the 32.768 kHz crystal.
        config.rcc.ls = LsConfig::default_lse();
    }
    let p = embassy_stm32::init(config);

    // Watchdog first: everything after it is covered.
    let mut wdg = IndependentWatchdog::new(p.IWDG, WATCHDOG_US);
    wdg.unleash();
    let mut wdg = Iwdg(wdg);

    // RTC: runs on the LSE; its backup registers keep the reset cause.
    let (rtc, _time) = Rtc::new(p.RTC, RtcConfig::default());
    let reset_cause = retained::take_cause(&rtc);

    // Fringe protocol on USART1 (interrupt-driven receive buffer).
    let mut ucfg = usart::Config::default();
    ucfg.baudrate = PROTOCOL_BAUD;
    let tx_buf = singleton!([u8; 512] = [0; 512]);
    let rx_buf = singleton!([u8; 256] = [0; 256]);
    let mut uart = match BufferedUart::new(p.USART1, p.PA10, p.PA9, tx_buf, rx_buf, Irqs, ucfg) {
        Ok(u) => u,
        Err(_) => panic!("USART1 configuration refused"),
    };

    // RS-485 on USART2: the Modbus line, first at the defaults (unit 1,
    // 19200 baud, 8E1); once the device has read its settings from flash,
    // `apply_line` moves it to them, as after a host's change.
    let mut line = SerialLine::DEFAULT;
    let (modbus_tx, _modbus_rx) =
        match Uart::new_blocking(p.USART2, p.PA3, p.PA2, modbus_config(&line)) {
            Ok(u) => u.split(),
            Err(_) => panic!("USART2 configuration refused"),
        };
    let mut rs485: Rs485 =
        match HalfDuplex::new(modbus_tx, Output::new(p.PA1, Level::Low, Speed::Low)) {
            Ok(h) => h,
            Err(_) => panic!("RS-485 driver enable"),
        };
    let slave = singleton!(
        RtuSlave = match RtuSlave::new(&line) {
            Ok(s) => s,
            Err(e) => panic!("{e}"),
        }
    );
    rs485::enable_rx_interrupt();

    // Flash: bank 2 as the device's NOR flash; its last page holds the
    // provisioning record (serial and write key, written at production).
    let mut flash = Flash::new_blocking(p.FLASH);
    let identity = provision::read(&mut flash);
    let flash: &'static Bus<Flash<'static, Blocking>> =
        singleton!(Bus<Flash<'static, Blocking>> = Mutex::new(RefCell::new(flash)));
    let storage = BlockingPartition::new(flash, STORAGE_OFFSET, STORAGE_SIZE);

    // The front end's three SPI buses (pins: README.md).
    let spi1: &'static Bus<Spi1> = singleton!(Bus<Spi1> = Mutex::new(RefCell::new(
        Spi::new_blocking(p.SPI1, p.PA5, p.PA7, p.PA6, spi_config(spi::MODE_0, 10_000_000))
    )));
    let spi2: &'static Bus<Spi1> = singleton!(Bus<Spi1> = Mutex::new(RefCell::new(
        Spi::new_blocking(p.SPI2, p.PB13, p.PB15, p.PB14, spi_config(spi::MODE_1, 8_000_000))
    )));
    let spi3: &'static Bus<Spi1> = singleton!(Bus<Spi1> = Mutex::new(RefCell::new(
        Spi::new_blocking(p.SPI3, p.PC10, p.PC12, p.PC11, spi_config(spi::MODE_1, 1_000_000))
    )));
    let cs = |pin: Peri<'static, AnyPin>| Output::new(pin, Level::High, Speed::VeryHigh);
    let dds = Ad9959::new(
        SpiDevice::new(spi1, cs(p.PA4.into())),
        Output::new(p.PB0, Level::Low, Speed::Low),
        Output::new(p.PB1, Level::Low, Speed::VeryHigh),
        DESIGN.dds,
    );
    let adc = Ads131m02::new(
        SpiDevice::new(spi2, cs(p.PB12.into())),
        Input::new(p.PC6, Pull::Up),
    );
    let rtd = Max31865::new(
        SpiDeviceWithConfig::new(spi3, cs(p.PA15.into()), spi_config(spi::MODE_1, 1_000_000)),
        Delay,
        DESIGN.rtd_wiring,
        f64::from(DESIGN.temp_ref_ohm) / 100.0,
    );
    let mut dac = Dac161s997::new(SpiDeviceWithConfig::new(
        spi3,
        cs(p.PC9.into()),
        spi_config(spi::MODE_0, 1_000_000),
    ));
    let switch = Output::new(p.PB2, Level::Low, Speed::Low);
    let mut frontend = AnalogFrontend::new(DESIGN, dds, adc, rtd, switch, Delay);

    // The loop first, so that it shows a failure while the rest comes up.
    // A DAC that does not answer leaves its own error current on the loop.
    let _ = dac.init();
    let mut output = LoopOutput::new(dac);
    let _ = output.set_ma(fringe_firmware::output::MA_FAIL_LOW);

    let Some((serial, key)) = identity else {
        unprovisioned(&mut uart, &mut wdg)
    };
    // A front end that does not come up is reported by every reading
    // (front-end error flags); the device still answers and logs.
    let _ = frontend.init();

    let dev = start(serial.as_str(), key, storage, frontend, output, reset_cause);
    let mut rx = [0u8; 64];
    loop {
        // The device's Modbus settings (stored ones at boot, a host's
        // change later): the UART and the slave follow between frames.
        let want = dev.modbus_line();
        if want != line {
            // A configuration the USART refuses (a baud rate its clock
            // cannot make) leaves the old one; not retried until the
            // settings change again.
            let _ = apply_line(&mut rs485, slave, &want);
            line = want;
        }
        serve_modbus(slave, &mut rs485, dev);
        let n = read_available(&mut uart, &mut rx);
        dev.poll_watched(
            Instant::now().as_millis(),
            rx.get(..n).unwrap_or(&[]),
            &mut |bytes| {
                let _ = embedded_io::Write::write_all(&mut uart, bytes);
            },
            &mut wdg,
        );
        if dev.reboot_requested() {
            retained::reset(&rtc, retained::Cause::Requested);
        }
        serve_modbus(slave, &mut rs485, dev);
    }
}

/// USART2's configuration for `line`: 8 data bits and the parity bit make
/// a 9-bit word in the USART (RM0440, from memory); without parity, 8
/// bits and two stop bits, so that a character stays 11 bits (Modbus over
/// Serial Line V1.02, section 2.5.1).
fn modbus_config(line: &SerialLine) -> usart::Config {
    let mut c = usart::Config::default();
    c.baudrate = line.baud;
    match line.parity {
        Parity::Even | Parity::Odd => {
            c.parity = if line.parity == Parity::Even {
                usart::Parity::ParityEven
            } else {
                usart::Parity::ParityOdd
            };
            c.data_bits = usart::DataBits::DataBits9;
            c.stop_bits = usart::StopBits::STOP1;
        }
        Parity::None => {
            c.parity = usart::Parity::ParityNone;
            c.data_bits = usart::DataBits::DataBits8;
            c.stop_bits = usart::StopBits::STOP2;
        }
    }
    c
}

/// Moves USART2 and the slave to `line`. `embassy-stm32`'s `set_config`
/// rewrites CR1 (clearing the receive and parity-error interrupt enables
/// `rs485` set), so they are enabled again after it. The slave drops a
/// frame in progress (read at the old settings).
fn apply_line(port: &mut Rs485, slave: &mut RtuSlave, line: &SerialLine) -> Result<(), ()> {
    port.tx_mut()
        .set_config(&modbus_config(line))
        .map_err(|_| ())?;
    rs485::enable_rx_interrupt();
    slave.reconfigure(line).map_err(|_| ())
}

/// Hands the Modbus bytes received to the slave and sends its answer, if
/// any, with the device's registers at this moment. A failed send is
/// dropped: the master repeats its request.
fn serve_modbus(slave: &mut RtuSlave, port: &mut Rs485, dev: &BoardDevice) {
    let now_us = Instant::now().as_micros();
    while let Some(rx) = rs485::take(now_us) {
        match rx {
            rs485::Rx::Byte(at_us, b) => slave.receive(at_us, b),
            rs485::Rx::Error(at_us) => slave.line_error(at_us),
        }
    }
    // (The time the bytes were taken to: a byte that came since is not fed
    // yet, and an answer must not go out over it as if the line were
    // quiet.)
    if let Some(answer) = slave.poll(now_us, || dev.modbus_registers(now_us / 1000)) {
        let _ = port.send(answer);
    }
}

/// Bytes the UART has received so far, without waiting.
fn read_available(uart: &mut BufferedUart<'static>, buf: &mut [u8]) -> usize {
    match embedded_io_async::ReadReady::read_ready(uart) {
        Ok(true) => embedded_io::Read::read(uart, buf).unwrap_or(0),
        _ => 0,
    }
}

/// No provisioning record: the device must not run with a published or
/// made-up key. Says so on the protocol UART every 2 s (plain text
/// between two 0x00 bytes, as the QEMU board's panic report, so a host's
/// frame decoder skips it) and keeps the watchdog fed; the loop stays at
/// the failure current set before.
fn unprovisioned(uart: &mut BufferedUart<'static>, wdg: &mut Iwdg) -> ! {
    let mut next = 0u64;
    loop {
        fringe_firmware::Watchdog::kick(wdg);
        let now = Instant::now().as_millis();
        if now >= next {
            let _ = embedded_io::Write::write_all(
                uart,
                b"\0not provisioned: write the serial and key record (README.md)\r\n\0",
            );
            next = now + 2000;
        }
    }
}

/// Boots the device into its static, out of line (the two-half boot of
/// DEVELOPERS.md, "Adding a board"): storage work first, then the device
/// is built straight into its slot.
#[inline(never)]
fn start(
    serial: &str,
    key: [u8; 32],
    storage: Storage,
    frontend: Frontend,
    output: Loop,
    reset_cause: ResetCause,
) -> &'static mut BoardDevice {
    let mut config = DeviceConfig::new(serial, key);
    // One record per poll: the Modbus slave is served between records.
    config.steps_per_poll = 1;
    let booted = match Booted::mount(storage, config, reset_cause) {
        Ok(b) => b,
        Err(e) => panic!("boot failed: {e}"),
    };
    build(
        singleton!(MaybeUninit<BoardDevice> = MaybeUninit::uninit()),
        booted,
        frontend,
        output,
    )
}

#[inline(never)]
fn build(
    slot: &'static mut MaybeUninit<BoardDevice>,
    booted: Booted<Storage>,
    frontend: Frontend,
    output: Loop,
) -> &'static mut BoardDevice {
    slot.write(Device::from_booted(
        booted,
        frontend,
        output,
        Instant::now().as_millis(),
    ))
}

#[panic_handler]
fn panic(_info: &core::panic::PanicInfo) -> ! {
    retained::reset_from_panic()
}
