//! `plumb keygen`, `plumb sign` and `plumb inspect` on signed files, as a
//! user runs them (the binary).

mod common;

use common::{plumb, Scratch};

use std::path::{Path, PathBuf};
use std::process::Output;

fn out(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

fn err(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

fn model() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../firmware/boards/mps2-an386/default.plumb")
}

fn keygen(dir: &Scratch, name: &str) -> (PathBuf, String) {
    let key = dir.path(name);
    let o = plumb(&["keygen", "--out", s(&key)]);
    assert_eq!(o.status.code(), Some(0), "{}", err(&o));
    let text = out(&o);
    let id = text
        .lines()
        .find_map(|l| l.strip_prefix("key id "))
        .unwrap_or_else(|| panic!("no key id in {text:?}"))
        .to_string();
    assert_eq!(id.len(), 16);
    assert!(text.contains("PLUMB_TRUSTED_KEY="), "{text}");
    (key, id)
}

#[test]
fn keygen_sign_inspect() {
    let dir = Scratch::new("sign");
    let (key, id) = keygen(&dir, "release");
    let public = dir.path("release.pub");
    assert!(std::fs::read_to_string(&public)
        .unwrap()
        .starts_with("plumb-ed25519-public "));

    // A second keygen on the same path is refused and keeps the key.
    let before = std::fs::read(&key).unwrap();
    let o = plumb(&["keygen", "--out", s(&key)]);
    assert_eq!(o.status.code(), Some(2));
    assert!(err(&o).contains("--force"), "{}", err(&o));
    assert_eq!(std::fs::read(&key).unwrap(), before);

    // Unsigned: inspect says so, and --trust refuses it.
    let o = plumb(&["inspect", s(&model())]);
    assert_eq!(o.status.code(), Some(0), "{}", err(&o));
    assert!(out(&o).contains("Signature\n  none"), "{}", out(&o));
    let o = plumb(&["inspect", s(&model()), "--trust", s(&public)]);
    assert_eq!(o.status.code(), Some(2));
    assert!(err(&o).contains("not signed"), "{}", err(&o));

    // Signed: same model, key id shown, verified.
    let signed = dir.path("signed.plumb");
    let o = plumb(&["sign", s(&model()), "--key", s(&key), "--out", s(&signed)]);
    assert_eq!(o.status.code(), Some(0), "{}", err(&o));
    assert!(out(&o).contains(&id), "{}", out(&o));
    let plain = std::fs::read(model()).unwrap();
    let sbytes = std::fs::read(&signed).unwrap();
    assert_eq!(sbytes.len(), plain.len() + 72);
    assert_eq!(
        plumb_model::signature::strip(&sbytes).unwrap(),
        plain,
        "only the signature was added"
    );
    let o = plumb(&["inspect", s(&signed), "--trust", s(&public)]);
    assert_eq!(o.status.code(), Some(0), "{}", err(&o));
    let text = out(&o);
    assert!(text.contains(&format!("ed25519, key id {id}")), "{text}");
    assert!(text.contains("verified with"), "{text}");
    // The summary above it is the unsigned file's.
    let plain_text = out(&plumb(&["inspect", s(&model())]));
    let head = |t: &str| t.split("\nSignature\n").next().unwrap().to_string();
    assert_eq!(head(&text), head(&plain_text));

    // JSON carries the same.
    let o = plumb(&["inspect", s(&signed), "--json", "--trust", s(&public)]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["signature"]["signed"], true);
    assert_eq!(v["signature"]["key_id"], id.as_str());
    assert_eq!(v["signature"]["verified"], true);

    // Another key: inspect names the file's key id and refuses.
    let (other, other_id) = keygen(&dir, "other");
    let o = plumb(&["inspect", s(&signed), "--trust", s(&dir.path("other.pub"))]);
    assert_eq!(o.status.code(), Some(2));
    assert!(err(&o).contains(&id), "{}", err(&o));
    assert!(out(&o).contains("NOT verified"), "{}", out(&o));

    // Re-signing with the other key replaces the signature.
    let resigned = dir.path("resigned.plumb");
    let o = plumb(&[
        "sign",
        s(&signed),
        "--key",
        s(&other),
        "--out",
        s(&resigned),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", err(&o));
    let o = plumb(&["inspect", s(&resigned)]);
    assert!(
        out(&o).contains(&format!("key id {other_id}")),
        "{}",
        out(&o)
    );

    // A byte changed after signing (CRC made to match): BadSignature.
    let mut tampered = sbytes.clone();
    tampered[20] ^= 0x01;
    let end = tampered.len() - 4;
    let crc = plumb_model::file::crc32(&tampered[..end]);
    tampered[end..].copy_from_slice(&crc.to_le_bytes());
    let t = dir.path("tampered.plumb");
    std::fs::write(&t, &tampered).unwrap();
    let o = plumb(&["inspect", s(&t), "--trust", s(&public)]);
    assert_eq!(o.status.code(), Some(2));
    assert!(err(&o).contains("does not verify"), "{}", err(&o));
}

#[test]
fn sign_refuses_the_wrong_inputs() {
    let dir = Scratch::new("sign-bad");
    let (key, _) = keygen(&dir, "k");
    let signed = dir.path("x.plumb");
    // The public key instead of the secret one.
    let o = plumb(&[
        "sign",
        s(&model()),
        "--key",
        s(&dir.path("k.pub")),
        "--out",
        s(&signed),
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(err(&o).contains("public key file"), "{}", err(&o));
    assert!(!signed.exists());
    // A damaged model.
    let mut bytes = std::fs::read(model()).unwrap();
    bytes[30] ^= 0x40;
    let bad = dir.path("bad.plumb");
    std::fs::write(&bad, &bytes).unwrap();
    let o = plumb(&["sign", s(&bad), "--key", s(&key), "--out", s(&signed)]);
    assert_eq!(o.status.code(), Some(2));
    assert!(err(&o).contains("CRC"), "{}", err(&o));
    assert!(!signed.exists());
}
