//! The Modbus TCP server goes on listening after a failed accept. With the
//! process out of file descriptors (this test lowers its own limit: the
//! test binary is a process of its own), every accept fails; once
//! descriptors are free again a new client is served. (Found by review: the
//! first failed accept ended the server for good, silently.)

use std::net::TcpStream;
use std::sync::Arc;
use std::time::{Duration, Instant};

use fringe_gateway::live::LiveTable;
use fringe_gateway::modbus::ModbusServer;
use fringe_protocol::{Flags, Reading, Seq};

fn open_files_limit() -> libc::rlimit {
    let mut r = libc::rlimit {
        rlim_cur: 0,
        rlim_max: 0,
    };
    // SAFETY: getrlimit writes the struct it is given.
    assert_eq!(unsafe { libc::getrlimit(libc::RLIMIT_NOFILE, &mut r) }, 0);
    r
}

fn set_open_files_limit(r: &libc::rlimit) {
    // SAFETY: setrlimit reads the struct it is given.
    assert_eq!(unsafe { libc::setrlimit(libc::RLIMIT_NOFILE, r) }, 0);
}

fn open_fds() -> u64 {
    std::fs::read_dir("/proc/self/fd").map_or(64, |d| d.count() as u64)
}

/// Unit 1's first input register pair, read by a Modbus TCP client.
fn read_unit_1(addr: std::net::SocketAddr) -> Result<Vec<u16>, String> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|e| e.to_string())?;
    rt.block_on(async {
        use tokio_modbus::client::Reader;
        let go = async {
            let mut ctx = tokio_modbus::client::tcp::connect_slave(addr, tokio_modbus::Slave(1))
                .await
                .map_err(|e| e.to_string())?;
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

#[test]
fn the_server_listens_again_after_running_out_of_file_descriptors() {
    let table = Arc::new(LiveTable::new(Duration::from_secs(60)));
    table.register(1, "PLT-FD-0001");
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
    assert!(read_unit_1(addr).is_ok(), "served before");

    // Out of descriptors: clients connect (the kernel completes the
    // handshake) until this process has none left, and the server's
    // accepts fail meanwhile.
    let before = open_files_limit();
    set_open_files_limit(&libc::rlimit {
        rlim_cur: open_fds() + 16,
        rlim_max: before.rlim_max,
    });
    let mut clients = Vec::new();
    for _ in 0..64 {
        match TcpStream::connect(addr) {
            Ok(c) => clients.push(c),
            Err(_) => break,
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    std::thread::sleep(Duration::from_millis(500));
    drop(clients);
    set_open_files_limit(&before);
    // Listening again (a second after the failure).
    std::thread::sleep(Duration::from_millis(1500));
    let served = read_unit_1(addr);
    assert!(
        served.is_ok(),
        "not served after the descriptors came back: {served:?}"
    );
    let said = said.lock().unwrap().clone();
    assert!(
        said.iter()
            .any(|t| t.contains("accepting a connection failed")),
        "the failure was not said: {said:?}"
    );
    server.stop();
}
