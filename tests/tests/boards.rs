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
        // The model file's offset in a slot, as memory.x states it ("the
        // model file at +0x100"), and the largest model file the board's
        // src/slots.rs documents for each slot ("at most N B"); memory.x is
        // read as words, without the comment's leading stars.
        let flat = text
            .split_whitespace()
            .filter(|w| *w != "*")
            .collect::<Vec<_>>()
            .join(" ");
        let at = flat
            .find("the model file at +")
            .unwrap_or_else(|| panic!("{}: memory.x states no model file offset", b.name));
        let offset = parse_number(
            flat[at + "the model file at +".len()..]
                .split(|c: char| !c.is_ascii_alphanumeric())
                .next()
                .unwrap(),
        );
        assert_eq!(offset, DATA_OFFSET, "{}: model file offset", b.name);
        let slot_len = region(&text, "SLOT_A").1;
        assert_eq!(b.capacity(), slot_len - offset, "{}", b.name);
        let slots = plumb_checks::root()
            .join("firmware/boards")
            .join(b.name)
            .join("src/slots.rs");
        let doc = std::fs::read_to_string(&slots).expect("read src/slots.rs");
        let documented: Vec<u32> = doc
            .lines()
            .filter_map(|l| l.split("at most ").nth(1))
            .map(|r| {
                r.split(" B")
                    .next()
                    .unwrap()
                    .replace(',', "")
                    .parse()
                    .unwrap()
            })
            .collect();
        assert_eq!(documented.len(), 2, "{}: one capacity per slot", b.name);
        for n in documented {
            assert_eq!(b.capacity(), n, "{}: capacity in src/slots.rs", b.name);
        }
    }
}
