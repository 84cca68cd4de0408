//! Idle connections cannot keep legitimate clients out: a daemon limited to 16 connections,
//! with 200 silent TCP connections opened against it, serves a real client (silent connections
//! are shed when a new one needs their slot, and closed at their handshake deadline anyway;
//! bounded wait, loopback only).

mod common;

use std::net::TcpStream;
use std::time::{Duration, Instant};

use common::Daemon;

#[test]
fn silent_connections_are_closed_and_a_real_client_gets_in() {
    let d = Daemon::start_with(&["--max-connections", "16", "--handshake-timeout", "1"]);
    // 200 connections that never send a byte: 16 take every slot, the rest wait to be accepted.
    let silent: Vec<TcpStream> = (0..200)
        .filter_map(|_| TcpStream::connect(&d.addr).ok())
        .collect();
    assert!(
        silent.len() >= 100,
        "only {} connections opened",
        silent.len()
    );
    // A real client retries until it is served; silent ones are closed after 1 s each, 16 at a
    // time, so it must get in well within the bound.
    let started = Instant::now();
    let bound = Duration::from_secs(60);
    let mut served = false;
    while started.elapsed() < bound {
        let r = common::run(d.client(Some(&d.admin)), &["whoami"]);
        if r.code == 0 {
            served = true;
            break;
        }
        std::thread::sleep(Duration::from_millis(200));
    }
    assert!(
        served,
        "a legitimate client was kept out for {bound:?} by silent connections"
    );
    eprintln!("served after {:.1} s", started.elapsed().as_secs_f64());
    drop(silent);
}
