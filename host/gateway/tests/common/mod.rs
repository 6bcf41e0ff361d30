//! What the Modbus TCP tests share.

use std::sync::Arc;
use std::time::{Duration, Instant};

use fringe_gateway::live::LiveTable;
use fringe_protocol::{Flags, Reading, Seq};

/// A live table whose unit 1 (device `serial`) has a reading of 14 %.
pub fn table_with_unit_1(serial: &str) -> Arc<LiveTable> {
    let table = Arc::new(LiveTable::new(Duration::from_secs(60)));
    table.register(1, serial);
    let reading = Reading {
        seq: Seq {
            boot: 1,
            counter: 1,
        },
        time_ms: 1_796_083_200_000,
        moisture_pct: Some(14.0),
        flags: Flags::empty(),
        ..Reading::default()
    };
    table.update(1, &reading, Instant::now());
    table
}

/// A Modbus TCP server on a free localhost port serving
/// [`table_with_unit_1`], and what it says (kept in order).
pub fn serving_unit_1(
    serial: &str,
) -> (
    fringe_gateway::modbus::ModbusServer,
    Arc<std::sync::Mutex<Vec<String>>>,
) {
    let said: Arc<std::sync::Mutex<Vec<String>>> = Arc::default();
    let tell = Arc::clone(&said);
    let server = fringe_gateway::modbus::ModbusServer::start_with(
        "127.0.0.1:0".parse().unwrap(),
        table_with_unit_1(serial),
        fringe_registers::WordOrder::HighFirst,
        None,
        Some(Arc::new(move |t: String| tell.lock().unwrap().push(t))),
    )
    .expect("bind");
    (server, said)
}

/// Unit 1's first input register pair, read by a Modbus TCP client.
#[allow(dead_code)] // (not every test binary reads from another address)
pub fn read_unit_1(addr: std::net::SocketAddr) -> Result<Vec<u16>, String> {
    read_unit_1_from(None, addr)
}

/// A TCP connection to `addr` from the address `from` (any address of the
/// loopback network, 127.0.0.0/8, is this host's).
#[allow(dead_code)]
pub fn connect_from(
    from: std::net::IpAddr,
    addr: std::net::SocketAddr,
) -> std::io::Result<std::net::TcpStream> {
    let s = socket2::Socket::new(socket2::Domain::IPV4, socket2::Type::STREAM, None)?;
    s.bind(&std::net::SocketAddr::new(from, 0).into())?;
    s.connect(&addr.into())?;
    Ok(s.into())
}

/// [`read_unit_1`] from the address `from` where given.
pub fn read_unit_1_from(
    from: Option<std::net::IpAddr>,
    addr: std::net::SocketAddr,
) -> Result<Vec<u16>, String> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|e| e.to_string())?;
    rt.block_on(async {
        use tokio_modbus::client::Reader;
        let go = async {
            let mut ctx = match from {
                None => tokio_modbus::client::tcp::connect_slave(addr, tokio_modbus::Slave(1))
                    .await
                    .map_err(|e| e.to_string())?,
                Some(ip) => {
                    let s = connect_from(ip, addr).map_err(|e| e.to_string())?;
                    s.set_nonblocking(true).map_err(|e| e.to_string())?;
                    let s = tokio::net::TcpStream::from_std(s).map_err(|e| e.to_string())?;
                    tokio_modbus::client::tcp::attach_slave(s, tokio_modbus::Slave(1))
                }
            };
            ctx.read_input_registers(0, 2)
                .await
                .map_err(|e| e.to_string())?
                .map_err(|e| format!("{e:?}"))
        };
        tokio::time::timeout(Duration::from_secs(5), go)
            .await
            .map_err(|_| "no answer within 5 s".to_string())?
    })
}
