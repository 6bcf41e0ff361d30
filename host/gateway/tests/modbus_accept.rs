//! The Modbus TCP server goes on listening after a failed accept. With the
//! process out of file descriptors (this test lowers its own limit: the
//! test binary is a process of its own), every accept fails; once
//! descriptors are free again a new client is served. (Found by review: the
//! first failed accept ended the server for good, silently.)

use std::net::TcpStream;
use std::time::Duration;

use common::{read_unit_1, serving_unit_1};

mod common;

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

#[test]
fn the_server_listens_again_after_running_out_of_file_descriptors() {
    let (server, said) = serving_unit_1("PLT-FD-0001");
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
