//! The host's board memory maps (`plumb::boards`, used by `plumb image`)
//! agree with the slot regions the boards reserve in their `memory.x`.

use plumb::boards::{BOARDS, DATA_OFFSET};

fn parse_number(s: &str) -> u32 {
    let s = s.trim();
    if let Some(h) = s.strip_prefix("0x").or_else(|| s.strip_prefix("0X")) {
        return u32::from_str_radix(&h.replace('_', ""), 16).expect("hex");
    }
    if let Some(k) = s.strip_suffix('K') {
        return k.parse::<u32>().expect("KiB") * 1024;
    }
    s.parse().expect("number")
}

/// `(origin, length)` of a region named `name` in a memory.x text.
fn region(text: &str, name: &str) -> (u32, u32) {
    let line = text
        .lines()
        .find(|l| l.trim_start().starts_with(name) && l.contains("ORIGIN"))
        .unwrap_or_else(|| panic!("no {name} region"));
    let field = |key: &str| {
        let rest = &line[line.find(key).expect(key) + key.len()..];
        let rest = rest.trim_start().trim_start_matches('=').trim_start();
        parse_number(rest.split(',').next().unwrap())
    };
    (field("ORIGIN"), field("LENGTH"))
}

#[test]
fn slot_regions_match_memory_x() {
    for b in BOARDS {
        let path = plumb_checks::root()
            .join("firmware/boards")
            .join(b.name)
            .join("memory.x");
        let text = std::fs::read_to_string(&path).expect("read memory.x");
        for (i, name) in ["SLOT_A", "SLOT_B"].into_iter().enumerate() {
            let (origin, len) = region(&text, name);
            assert_eq!(origin, b.regions[i], "{}: {name} origin", b.name);
            assert_eq!(len, b.region_len, "{}: {name} length", b.name);
        }
        let (flash, flash_len) = region(&text, "FLASH");
        assert!(
            flash + flash_len <= b.regions[0],
            "{}: the program region overlaps slot A",
            b.name
        );
        assert!(b.capacity() == b.region_len - DATA_OFFSET);
    }
}
