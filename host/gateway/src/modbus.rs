//! A read-only Modbus TCP server of the [`LiveTable`] (tokio-modbus).
//!
//! Each device is one unit id. Function 04 (read input registers) answers
//! from the register map of `fringe-registers`; every other function, the
//! writes included, is refused with exception 01 (illegal function): no
//! Modbus request changes a device. A unit the gateway does not serve is
//! answered with exception 0B (gateway target device failed to respond),
//! the answer the Modbus application protocol specification V1.1b3 gives a
//! gateway for a target it cannot reach.
//!
//! Modbus has no authentication: the server listens on localhost unless the
//! site file says otherwise, and a plant network puts it inside its control
//! zone behind the OT firewall (see `docs/MODBUS.md`).

use std::future;
use std::io;
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Instant;

use fringe_registers::{map, read_input_registers, with_word_order, Exception, WordOrder};
use tokio::net::TcpListener;
use tokio_modbus::server::tcp::{accept_tcp_connection, Server};
use tokio_modbus::{ExceptionCode, Request, Response, SlaveRequest};

use crate::live::LiveTable;

/// Answers one request from `table` at `now` (the whole logic of the
/// server, callable without a socket).
///
/// # Errors
/// The Modbus exception the request earns.
pub fn answer(
    table: &LiveTable,
    unit: u8,
    req: &Request<'_>,
    now: Instant,
) -> Result<Response, ExceptionCode> {
    answer_in(table, unit, req, now, WordOrder::HighFirst)
}

/// As [`answer`], with the 32-bit values in word order `order`.
///
/// # Errors
/// The Modbus exception the request earns.
pub fn answer_in(
    table: &LiveTable,
    unit: u8,
    req: &Request<'_>,
    now: Instant,
    order: WordOrder,
) -> Result<Response, ExceptionCode> {
    let Request::ReadInputRegisters(addr, count) = *req else {
        return Err(ExceptionCode::IllegalFunction);
    };
    let snapshot = table
        .snapshot(unit, now)
        .ok_or(ExceptionCode::GatewayTargetDevice)?;
    let m = with_word_order(map(&snapshot), order);
    read_input_registers(&m, addr, count)
        .map(|words| Response::ReadInputRegisters(words.to_vec()))
        .map_err(|e| match e {
            Exception::IllegalFunction => ExceptionCode::IllegalFunction,
            Exception::IllegalDataAddress => ExceptionCode::IllegalDataAddress,
            Exception::IllegalDataValue => ExceptionCode::IllegalDataValue,
        })
}

struct Service {
    table: Arc<LiveTable>,
    order: WordOrder,
}

impl tokio_modbus::server::Service for Service {
    type Request = SlaveRequest<'static>;
    type Response = Response;
    type Exception = ExceptionCode;
    type Future = future::Ready<Result<Response, ExceptionCode>>;

    fn call(&self, req: Self::Request) -> Self::Future {
        future::ready(answer_in(
            &self.table,
            req.slave,
            &req.request,
            Instant::now(),
            self.order,
        ))
    }
}

/// A Modbus TCP server running on its own thread.
#[derive(Debug)]
pub struct ModbusServer {
    addr: SocketAddr,
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl ModbusServer {
    /// Binds `addr` (port 0 picks a free one) and serves `table` until
    /// [`ModbusServer::stop`] or drop.
    ///
    /// # Errors
    /// When the address cannot be bound (in use, no permission for a port
    /// below 1024) or the runtime cannot start.
    pub fn start(addr: SocketAddr, table: Arc<LiveTable>) -> io::Result<Self> {
        Self::start_in(addr, table, WordOrder::HighFirst)
    }

    /// As [`ModbusServer::start`], serving the 32-bit values in word order
    /// `order` (the site file's `[modbus] word_order`).
    ///
    /// # Errors
    /// As [`ModbusServer::start`].
    pub fn start_in(addr: SocketAddr, table: Arc<LiveTable>, order: WordOrder) -> io::Result<Self> {
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()?;
        let listener = rt.block_on(TcpListener::bind(addr))?;
        let addr = listener.local_addr()?;
        let (tx, rx) = tokio::sync::oneshot::channel::<()>();
        let thread = std::thread::Builder::new()
            .name("modbus-tcp".into())
            .spawn(move || {
                rt.block_on(async move {
                    let server = Server::new(listener);
                    let on_connected = |stream, socket_addr| {
                        let table = Arc::clone(&table);
                        async move {
                            accept_tcp_connection(stream, socket_addr, move |_| {
                                Ok(Some(Service {
                                    table: Arc::clone(&table),
                                    order,
                                }))
                            })
                        }
                    };
                    // A broken client connection ends only that connection.
                    let on_process_error = |_err: io::Error| {};
                    let stop = async move {
                        let _ = rx.await;
                    };
                    let _ = server
                        .serve_until(&on_connected, on_process_error, stop)
                        .await;
                });
            })?;
        Ok(Self {
            addr,
            stop: Some(tx),
            thread: Some(thread),
        })
    }

    /// The address it listens on.
    pub fn local_addr(&self) -> SocketAddr {
        self.addr
    }

    /// Stops listening and waits for the server thread.
    pub fn stop(mut self) {
        self.shutdown();
    }

    fn shutdown(&mut self) {
        if let Some(tx) = self.stop.take() {
            let _ = tx.send(());
        }
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

impl Drop for ModbusServer {
    fn drop(&mut self) {
        self.shutdown();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_protocol::{CalId, ChannelValue, Flags, Reading, Seq};
    use std::time::Duration;

    fn reading(counter: u32, moisture: f32) -> Reading {
        Reading {
            seq: Seq { boot: 1, counter },
            time_ms: 1_796_083_200_000,
            channels: [ChannelValue::default(); 2],
            temperature_c: 20.0,
            moisture_pct: Some(moisture),
            uncertainty_pct: 0.1,
            flags: Flags::empty(),
            cell_cal: CalId::NONE,
            product_cal: CalId::NONE,
        }
    }

    #[test]
    fn low_word_first_serves_the_floats_swapped() {
        let t = LiveTable::new(Duration::from_secs(10));
        t.register(1, "HGM-L2-0001");
        let now = Instant::now();
        t.update(1, &reading(5, 14.5), now);
        let ok = answer_in(
            &t,
            1,
            &Request::ReadInputRegisters(0, 14),
            now,
            WordOrder::LowFirst,
        )
        .unwrap();
        let Response::ReadInputRegisters(w) = ok else {
            panic!("{ok:?}")
        };
        // Low word first: the moisture and the known value 1234.5
        // (0x449A5000) with their words swapped.
        assert_eq!(
            f32::from_bits(u32::from(w[1]) << 16 | u32::from(w[0])),
            14.5
        );
        assert_eq!(&w[12..14], &[0x5000, 0x449A]);
    }

    #[test]
    fn only_function_04_of_a_served_unit_is_answered() {
        let t = LiveTable::new(Duration::from_secs(10));
        t.register(3, "HGM-L2-0001");
        let now = Instant::now();
        t.update(3, &reading(5, 14.5), now);
        let ok = answer(&t, 3, &Request::ReadInputRegisters(0, 2), now).unwrap();
        let Response::ReadInputRegisters(w) = ok else {
            panic!("{ok:?}")
        };
        assert_eq!(
            f32::from_bits(u32::from(w[0]) << 16 | u32::from(w[1])),
            14.5
        );
        assert_eq!(
            answer(&t, 4, &Request::ReadInputRegisters(0, 2), now),
            Err(ExceptionCode::GatewayTargetDevice)
        );
        assert_eq!(
            answer(&t, 3, &Request::ReadHoldingRegisters(0, 2), now),
            Err(ExceptionCode::IllegalFunction)
        );
        assert_eq!(
            answer(&t, 3, &Request::WriteSingleRegister(0, 1), now),
            Err(ExceptionCode::IllegalFunction)
        );
        assert_eq!(
            answer(&t, 3, &Request::ReadInputRegisters(24, 2), now),
            Err(ExceptionCode::IllegalDataAddress)
        );
    }

    #[test]
    fn an_old_reading_goes_stale_and_an_older_one_never_replaces_a_newer() {
        let t = LiveTable::new(Duration::from_secs(10));
        t.register(1, "A");
        let t0 = Instant::now();
        t.update(1, &reading(9, 12.0), t0);
        t.update(1, &reading(8, 11.0), t0);
        let s = t.snapshot(1, t0 + Duration::from_secs(3)).unwrap();
        assert_eq!(s.reading.unwrap().seq.counter, 9);
        assert_eq!(s.age_s, 3);
        assert!(!s.stale);
        assert!(t.snapshot(1, t0 + Duration::from_secs(11)).unwrap().stale);
        t.set_connected(1, false);
        assert!(!t.snapshot(1, t0).unwrap().connected);
    }
}
