//! `plumb listen` (the binary) against a scripted device on a loopback TCP
//! port, no hardware: noise before the first frame, the port going away and
//! coming back (reconnect with backoff), and a device that restarted
//! (greeting again, numbering from 0). Each shows as one `notice` line and
//! every drift event is printed once.

use plumb_model::wire::{
    self, DeviceFrame, DeviceMsg, DriftRaised, Greeting, HostFrameDecoder, HostMsg, ScoreTriple,
    Share,
};
use plumb_model::{Capacity, Dims};
use std::io::{Read, Write};
use std::net::{TcpListener, TcpStream};
use std::process::Command;
use std::time::{Duration, Instant};

fn greeting() -> DeviceMsg {
    greeting_of(wire::PROTOCOL_VERSION)
}

/// A greeting announcing protocol version `protocol`.
fn greeting_of(protocol: u16) -> DeviceMsg {
    DeviceMsg::Greeting(Greeting {
        protocol,
        firmware: heapless::String::try_from("script 1").unwrap(),
        model_id: 0xabcd,
        schema: 1,
        dims: Dims {
            features: 2,
            components: 1,
            mixture: 1,
        },
        capacity: Capacity::DEVICE,
        active: None,
        generation: 0,
        status_every: 0,
    })
}

fn raised(sample: u64) -> DeviceMsg {
    DeviceMsg::DriftRaised(DriftRaised {
        sample,
        drivers: 1,
        scores: ScoreTriple {
            spe: 9.0,
            t2: 1.0,
            nll: 2.0,
        },
        crossed: heapless::Vec::new(),
        top: [Share {
            feature: 255,
            value: 0.0,
        }; 3],
    })
}

/// A scripted device on one connection: numbers its messages from `seq`,
/// answers every greeting query with a greeting and then sends `after`
/// once; returns when the host closes or `until` passes.
fn serve(c: TcpStream, seq: u32, after: Vec<DeviceMsg>, until: Instant) -> u32 {
    serve_as(c, seq, greeting(), after, until)
}

/// [`serve`], answering greeting queries with `hello`.
fn serve_as(
    mut c: TcpStream,
    mut seq: u32,
    hello: DeviceMsg,
    after: Vec<DeviceMsg>,
    until: Instant,
) -> u32 {
    c.set_read_timeout(Some(Duration::from_millis(50))).unwrap();
    let mut dec = HostFrameDecoder::new();
    let mut after = Some(after);
    let mut buf = [0u8; 512];
    while Instant::now() < until {
        let n = match c.read(&mut buf) {
            Ok(0) => break,
            Ok(n) => n,
            Err(_) => continue,
        };
        let mut rest = &buf[..n];
        loop {
            rest = dec.feed(rest);
            match dec.take_message::<HostMsg>() {
                Some(Ok(HostMsg::GreetingQuery)) => {
                    let mut out = wire::encode_frame_vec(&DeviceFrame {
                        seq,
                        msg: hello.clone(),
                    });
                    seq += 1;
                    for msg in after.take().unwrap_or_default() {
                        out.extend(wire::encode_frame_vec(&DeviceFrame { seq, msg }));
                        seq += 1;
                    }
                    c.write_all(&out).unwrap();
                }
                Some(_) => {}
                None if rest.is_empty() => break,
                None => {}
            }
        }
    }
    seq
}

/// Runs `plumb listen --tcp ADDR --for 4 --reply-ms 300 --plain` plus
/// `extra`; returns the exit code, standard output and standard error.
fn run_listen(addr: &std::net::SocketAddr, extra: &[&str]) -> (Option<i32>, String, String) {
    let addr = addr.to_string();
    let mut args = vec![
        "listen",
        "--tcp",
        &addr,
        "--for",
        "4",
        "--reply-ms",
        "300",
        "--plain",
    ];
    args.extend_from_slice(extra);
    let out = Command::new(env!("CARGO_BIN_EXE_plumb"))
        .args(&args)
        .output()
        .expect("run plumb listen");
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn listen_survives_noise_an_unplugged_port_and_a_restart() {
    let l = TcpListener::bind("127.0.0.1:0").unwrap();
    let addr = l.local_addr().unwrap();
    let device = std::thread::spawn(move || {
        // Session 1: a boot banner with no frame delimiter runs into the
        // first greeting (lost); the host asks again; then an event.
        let (mut c, _) = l.accept().unwrap();
        c.write_all(b"bootloader 2.1 ready\r\n\xfe\xfd").unwrap();
        let until = Instant::now() + Duration::from_millis(1500);
        let seq = serve(c, 0, vec![raised(10)], until);
        // The port goes away for a while (connections refused).
        drop(l);
        std::thread::sleep(Duration::from_millis(700));
        // Back, after the device restarted: the greeting the host asks for
        // is numbered 0 again, then a new event.
        let l = TcpListener::bind(addr).unwrap();
        let (c, _) = l.accept().unwrap();
        serve(
            c,
            0,
            vec![raised(99)],
            Instant::now() + Duration::from_secs(10),
        );
        seq
    });
    let (code, text, err) = run_listen(&addr, &[]);
    assert_eq!(code, Some(1), "drift was raised\n{text}\n{err}");
    let lines: Vec<&str> = text.lines().collect();
    let first = |p: &str| {
        lines
            .iter()
            .position(|l| l.starts_with(p))
            .unwrap_or_else(|| panic!("no line starting {p:?} in\n{text}"))
    };
    let count = |p: &str| lines.iter().filter(|l| l.starts_with(p)).count();
    // Order of what happened.
    let garbage = first("notice what=garbage");
    let greet = first("greeting ");
    let down = first("notice what=disconnected");
    let retry = first("notice what=reconnecting attempt=1");
    let back = first("notice what=reconnected");
    let restart = first("notice what=restart seq=0");
    assert!(
        garbage < greet && greet < down && down < retry && retry < back && back < restart,
        "{text}"
    );
    assert!(lines[restart].ends_with("by=greeting"), "{text}");
    // Each event once, the one after the restart included.
    assert_eq!(count("raised "), 2, "{text}");
    // Sample 10 came right after the greeting that the banner spoiled (so
    // before the greeting asked for again); sample 99 after the restart.
    assert!(text.contains("raised seq=1 sample=10"), "{text}");
    assert!(first("raised seq=1 sample=99") > restart, "{text}");
    assert_eq!(count("notice what=garbage"), 1);
    assert_eq!(count("notice what=reconnected"), 1);
    let link = lines.iter().find(|l| l.starts_with("link ")).unwrap();
    assert!(link.contains("restarts=1"), "{link}");
    assert!(link.ends_with("reconnects=1"), "{link}");
    device.join().unwrap();
}

/// Runs `plumb listen --plain` for at most 4 s against a scripted device
/// that answers greeting queries with `hello` and then sends `after`;
/// returns the exit code, standard output and standard error.
fn listen_to(hello: DeviceMsg, after: Vec<DeviceMsg>) -> (Option<i32>, String, String) {
    let l = TcpListener::bind("127.0.0.1:0").unwrap();
    let addr = l.local_addr().unwrap();
    let device = std::thread::spawn(move || {
        let (c, _) = l.accept().unwrap();
        serve_as(c, 0, hello, after, Instant::now() + Duration::from_secs(6));
    });
    let out = run_listen(&addr, &["--no-reconnect"]);
    device.join().unwrap();
    out
}

#[test]
fn listen_refuses_a_device_of_another_protocol_version() {
    // A version 1 board (before per-sample crossings): listen stops at its
    // greeting, with usage/link exit code 2 and both versions named, and
    // prints none of what follows.
    let (code, text, err) = listen_to(greeting_of(1), vec![raised(10)]);
    assert_eq!(code, Some(2), "{text}\n{err}");
    let want = format!(
        "the device speaks protocol version 1; this host knows version {}",
        wire::PROTOCOL_VERSION
    );
    assert!(err.contains(&want), "{err}");
    assert!(!text.contains("raised "), "{text}");
    // The same script speaking this host's version is listened to.
    let (code, text, err) = listen_to(greeting(), vec![raised(10)]);
    assert_eq!(code, Some(1), "drift was raised\n{text}\n{err}");
    assert!(text.contains("raised seq=1 sample=10"), "{text}");
}

#[test]
fn listen_stops_when_a_later_greeting_speaks_another_version() {
    // The board restarts on other firmware mid-session: its new greeting
    // (numbered from 0 again) announces a version after this host's. What
    // came before is printed; then listen stops with an error naming it.
    let newer = wire::PROTOCOL_VERSION + 1;
    let mut late = greeting_of(newer);
    if let DeviceMsg::Greeting(g) = &mut late {
        g.firmware = heapless::String::try_from("script 2").unwrap();
    }
    let l = TcpListener::bind("127.0.0.1:0").unwrap();
    let addr = l.local_addr().unwrap();
    let device = std::thread::spawn(move || {
        let (mut c, _) = l.accept().unwrap();
        let until = Instant::now() + Duration::from_millis(800);
        serve(c.try_clone().unwrap(), 0, vec![raised(10)], until);
        c.write_all(&wire::encode_frame_vec(&DeviceFrame { seq: 0, msg: late }))
            .unwrap();
        // Keep the connection open until the host leaves.
        let mut buf = [0u8; 64];
        c.set_read_timeout(Some(Duration::from_secs(6))).unwrap();
        while matches!(c.read(&mut buf), Ok(n) if n > 0) {}
    });
    let (code, text, err) = run_listen(&addr, &["--no-reconnect"]);
    device.join().unwrap();
    assert_eq!(code, Some(2), "{text}\n{err}");
    assert!(text.contains("raised seq=1 sample=10"), "{text}");
    assert!(
        text.contains(&format!("protocol={newer}")),
        "the late greeting is shown: {text}"
    );
    let want = format!(
        "the device speaks protocol version {newer}; this host knows version {}",
        wire::PROTOCOL_VERSION
    );
    assert!(err.contains(&want), "{err}");
}
