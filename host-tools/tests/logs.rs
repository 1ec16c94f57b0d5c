//! The log reader as a library: chunking, threads, label mapping, dropouts.

mod common;

use common::{log_text, Scratch};
use plumb::logs::{BadCells, LogSet, ReadOptions, Selection};
use plumb::progress::Stage;
use plumb_model::file::Label;

fn read_all(set: &LogSet, sel: &Selection) -> (Vec<f64>, Vec<u64>, Vec<f64>, u64) {
    let mut values = Vec::new();
    let mut lines = Vec::new();
    let mut times = Vec::new();
    let stats = set
        .for_each(sel, &Stage::hidden(), |c| {
            values.extend_from_slice(&c.values);
            lines.extend_from_slice(&c.lines);
            times.extend_from_slice(&c.times);
            Ok(())
        })
        .unwrap();
    (values, lines, times, stats.total_skipped())
}

#[test]
fn chunking_and_threads_do_not_change_rows() {
    let d = Scratch::new("chunks");
    let a = d.write("a.csv", &log_text(6, 5000, 1));
    let b = d.write("b.csv", &log_text(6, 3000, 2));
    let paths = vec![a, b];
    let reference = {
        let set = LogSet::open(&paths, ReadOptions::default()).unwrap();
        read_all(&set, &Selection::all(2))
    };
    assert_eq!(reference.1.len(), 8000);
    assert_eq!(reference.1[0], 2);
    assert_eq!(reference.1[4999], 5001);
    assert_eq!(reference.1[5000], 2);
    assert!((reference.2[1] - 0.01).abs() < 1e-12);
    for (threads, block) in [
        (1, 4096),
        (2, 4096),
        (2, 65_536),
        (2, 100_000),
        (1, 1 << 22),
    ] {
        let opts = ReadOptions {
            threads,
            block_bytes: block,
            ..ReadOptions::default()
        };
        let set = LogSet::open(&paths, opts).unwrap();
        let got = read_all(&set, &Selection::all(2));
        assert_eq!(got, reference, "threads {threads}, block {block}");
    }
}

#[test]
fn head_and_tail_split() {
    let d = Scratch::new("split");
    let a = d.write("a.csv", &log_text(3, 1000, 1));
    let b = d.write("b.csv", &log_text(3, 11, 2));
    let opts = ReadOptions {
        block_bytes: 4096,
        ..ReadOptions::default()
    };
    let set = LogSet::open(&[a, b], opts).unwrap();
    let lines = set.count_lines(&Stage::hidden()).unwrap();
    assert_eq!(lines, vec![1000, 11]);
    let (head, tail) = Selection::split_tail(&lines, 0.2);
    let (_, hl, _, _) = read_all(&set, &head);
    let (tv, tl, _, _) = read_all(&set, &tail);
    // A second scan of the same tail seeks (resume hint) and sees the same rows.
    assert_eq!(read_all(&set, &tail), read_all(&set.clone(), &tail));
    assert_eq!(read_all(&set, &tail).0, tv);
    assert_eq!(hl.len(), 800 + 9);
    assert_eq!(tl.len(), 200 + 2);
    assert_eq!(*hl.last().unwrap(), 10); // b.csv data lines 2..=10
    assert_eq!(tl[0], 802); // a.csv line 802 is data line 800
    assert_eq!(tl[200], 11);
}

#[test]
fn crlf_bom_blank_lines_and_quotes() {
    let d = Scratch::new("crlf");
    let text = "\u{feff}\"t[s]\",a[m],\"b\"\r\n0,1,2\r\n\r\n1,3,4\r\n2,5,6";
    let p = d.write("a.csv", text);
    let set = LogSet::open(&[p], ReadOptions::default()).unwrap();
    assert_eq!(
        set.labels(),
        &[
            Label {
                name: "a".into(),
                unit: "m".into()
            },
            Label {
                name: "b".into(),
                unit: String::new()
            }
        ]
    );
    let (v, l, t, _) = read_all(&set, &Selection::all(1));
    assert_eq!(v, vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
    assert_eq!(l, vec![2, 4, 5]);
    assert_eq!(t, vec![0.0, 1.0, 2.0]);
    assert_eq!(set.count_lines(&Stage::hidden()).unwrap(), vec![4]);
}

#[test]
fn mapped_to_model_labels() {
    let d = Scratch::new("labels");
    let p = d.write("r.csv", "extra,y[V],t[s],x[A]\n9,2,0.0,1\n9,4,0.1,3\n");
    let labels = vec![
        Label {
            name: "x".into(),
            unit: "A".into(),
        },
        Label {
            name: "y".into(),
            unit: "V".into(),
        },
    ];
    let set =
        LogSet::open_for_labels(std::slice::from_ref(&p), &labels, ReadOptions::default()).unwrap();
    let (v, _, t, _) = read_all(&set, &Selection::all(1));
    assert_eq!(v, vec![1.0, 2.0, 3.0, 4.0]);
    assert_eq!(t, vec![0.0, 0.1]);
    assert_eq!(set.files()[0].feature_column(0), 4);
    // A label the log lacks.
    let more = [
        labels.clone(),
        vec![Label {
            name: "z".into(),
            unit: String::new(),
        }],
    ]
    .concat();
    let e = LogSet::open_for_labels(std::slice::from_ref(&p), &more, ReadOptions::default())
        .unwrap_err();
    assert_eq!(e.code, 2);
    assert!(
        e.to_string()
            .contains(":1 (z): expected a column named \"z\""),
        "{e}"
    );
    // A unit that differs.
    let mv = vec![Label {
        name: "x".into(),
        unit: "mA".into(),
    }];
    let e = LogSet::open_for_labels(&[p], &mv, ReadOptions::default()).unwrap_err();
    assert!(
        e.to_string()
            .contains(":1:4 (x): expected unit \"mA\", found \"A\""),
        "{e}"
    );
}

#[test]
fn dropouts_pass_as_nan_or_skip() {
    let d = Scratch::new("dropout");
    let p = d.write("a.csv", "t[s],a,b\n0,1,NaN\n1,,2\n2,3,4\n3,inf,5\n");
    let pass = ReadOptions {
        bad_cells: BadCells::PassAsNan,
        ..ReadOptions::default()
    };
    let set = LogSet::open(std::slice::from_ref(&p), pass).unwrap();
    let (v, l, _, skipped) = read_all(&set, &Selection::all(1));
    assert_eq!(l, vec![2, 3, 4, 5]);
    assert_eq!(skipped, 0);
    assert!(v[1].is_nan() && v[2].is_nan() && v[6].is_nan());
    assert_eq!(v[4..6], [3.0, 4.0]);
    let skip = ReadOptions {
        bad_cells: BadCells::SkipRow,
        ..ReadOptions::default()
    };
    let set = LogSet::open(std::slice::from_ref(&p), skip).unwrap();
    let (v, l, _, skipped) = read_all(&set, &Selection::all(1));
    assert_eq!((v, l, skipped), (vec![3.0, 4.0], vec![4], 3));
    let set = LogSet::open(&[p], ReadOptions::default()).unwrap();
    let e = set
        .for_each(&Selection::all(1), &Stage::hidden(), |_| Ok(()))
        .unwrap_err();
    assert!(
        e.to_string()
            .contains("a.csv:2:3 (b): expected a finite number, found \"NaN\""),
        "{e}"
    );
}

#[test]
fn no_time_column_and_units_sidecar() {
    let d = Scratch::new("notime");
    let p = d.write("a.csv", "a[m],b\n1,2\n3,4\n");
    let units = d.write("u.csv", "b,kg\n");
    let opts = ReadOptions {
        time_column: None,
        units: plumb::logs::read_units(&units).unwrap(),
        ..ReadOptions::default()
    };
    let set = LogSet::open(&[p], opts).unwrap();
    assert_eq!(set.labels()[1].unit, "kg");
    let (v, _, t, _) = read_all(&set, &Selection::all(1));
    assert_eq!(v, vec![1.0, 2.0, 3.0, 4.0]);
    assert!(t.is_empty());
}
