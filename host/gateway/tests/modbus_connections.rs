//! The Modbus TCP server's limit on open connections. (A test binary of its
//! own: `modbus_accept.rs` lowers its process's limit on open files.)

use std::net::TcpStream;
use std::sync::Arc;
use std::time::{Duration, Instant};

use common::{read_unit_1, table_with_unit_1};
use fringe_gateway::modbus::ModbusServer;

mod common;

/// At most `MAX_CONNECTIONS` connections are open at once: one more is
/// closed as it is accepted and said (once a minute at most), and a client
/// is served again once a connection ends. (Without a limit, a client that
/// kept opening connections took the process's file descriptors, and the
/// failed accept then closed every connection, the PLC's too.)
#[test]
fn connections_past_the_limit_are_closed_and_the_rest_still_served() {
    use fringe_gateway::modbus::MAX_CONNECTIONS;
    use std::io::Read;

    let table = table_with_unit_1("PLT-FD-0002");
    let said: Arc<std::sync::Mutex<Vec<String>>> = Arc::default();
    let tell = Arc::clone(&said);
    let server = ModbusServer::start_with(
        "127.0.0.1:0".parse().unwrap(),
        Arc::clone(&table),
        fringe_registers::WordOrder::HighFirst,
        None,
        Some(Arc::new(move |t: String| tell.lock().unwrap().push(t))),
    )
    .expect("bind");
    let addr = server.local_addr();
    // Connections held open without a request (the server accepts them in
    // the order they came).
    let mut held: Vec<TcpStream> = (0..MAX_CONNECTIONS)
        .map(|_| TcpStream::connect(addr).expect("connect"))
        .collect();
    // One more: closed by the server (end of stream, no answer).
    let mut extra = TcpStream::connect(addr).expect("connect");
    extra
        .set_read_timeout(Some(Duration::from_secs(5)))
        .unwrap();
    let mut buf = [0u8; 8];
    let got = extra.read(&mut buf);
    assert!(
        matches!(got, Ok(0))
            || got
                .as_ref()
                .is_err_and(|e| e.kind() == std::io::ErrorKind::ConnectionReset),
        "the connection past the limit was not closed: {got:?}"
    );
    assert!(read_unit_1(addr).is_err(), "served past the limit");
    // A held connection ends: a new client is served.
    drop(held.pop());
    let t0 = Instant::now();
    let served = loop {
        match read_unit_1(addr) {
            Ok(w) => break Ok(w),
            Err(e) if t0.elapsed() > Duration::from_secs(5) => break Err(e),
            Err(_) => std::thread::sleep(Duration::from_millis(50)),
        }
    };
    assert!(served.is_ok(), "not served after one closed: {served:?}");
    let said = said.lock().unwrap().clone();
    assert_eq!(
        said.iter()
            .filter(|t| t.contains("connections are open"))
            .count(),
        1,
        "said once (a minute): {said:?}"
    );
    drop(held);
    server.stop();
}
