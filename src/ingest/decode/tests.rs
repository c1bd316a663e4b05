use super::*;

/// Good rows as (line, cells as text), and bad rows as their messages.
type Collected = (Vec<(u64, Vec<Option<String>>)>, Vec<String>);

fn collect(body: &[u8], format: Format, cols: &[&str]) -> Collected {
    let mut good = Vec::new();
    let mut bad = Vec::new();
    for_each_row(body, format, "f", cols, |r| {
        match r {
            Ok(row) => good.push((
                row.line,
                (0..row.len()).map(|i| row.cell(i).map(|b| String::from_utf8_lossy(b).into_owned())).collect(),
            )),
            Err(e) => bad.push(e.to_string()),
        }
        Ok(())
    })
    .unwrap();
    (good, bad)
}

#[test]
fn csv_cells_come_in_the_order_asked_with_line_numbers() {
    let (good, bad) = collect(b"a,b,c\n1,2,3\n\"x,y\",5,6\n", Format::Csv, &["c", "a"]);
    assert!(bad.is_empty());
    assert_eq!(good[0], (2, vec![Some("3".into()), Some("1".into())]));
    assert_eq!(good[1], (3, vec![Some("6".into()), Some("x,y".into())]));
}

#[test]
fn csv_ragged_rows_are_row_errors_and_reading_goes_on() {
    let (good, bad) = collect(b"a,b\n1,2\n3\n4,5\n", Format::Csv, &["a"]);
    assert_eq!(good.len(), 2);
    assert_eq!(bad, ["f:3: row: has 1 fields, the header has 2"]);
}

#[test]
fn csv_missing_column_is_a_file_error() {
    let e = for_each_row(&b"a,b\n1,2\n"[..], Format::Csv, "f", &["z"], |_| Ok(())).unwrap_err();
    assert_eq!(e.to_string(), "f:1: column z: not in the header (columns: a, b)");
}

#[test]
fn jsonl_scalars_become_text_and_bad_lines_do_not_stop_the_read() {
    let body =
        b"{\"a\": 1.5, \"b\": \"x\"}\nnot json\n[1]\n{\"a\": true, \"b\": null}\n{\"a\": {\"n\": 1}, \"b\": 2}\n";
    let (good, bad) = collect(body, Format::Jsonl, &["a", "b"]);
    assert_eq!(good, [(1, vec![Some("1.5".into()), Some("x".into())]), (4, vec![Some("true".into()), None])]);
    assert_eq!(bad.len(), 3);
    assert!(bad[0].starts_with("f:2: row: invalid JSON"));
    assert_eq!(bad[1], "f:3: row: expected a JSON object, got an array");
    assert_eq!(bad[2], "f:5: column a: expected a string or number, got an object");
}

#[test]
fn a_visitor_error_stops_the_read() {
    let mut seen = 0;
    let e = for_each_row(&b"a\n1\n2\n3\n"[..], Format::Csv, "f", &["a"], |r| {
        seen += 1;
        let row = r?;
        if row.line == 3 {
            return Err(DecodeError::row("f", row.line, "stop"));
        }
        Ok(())
    })
    .unwrap_err();
    assert_eq!(seen, 2);
    assert_eq!(e.to_string(), "f:3: row: stop");
}

#[test]
fn format_from_extension() {
    assert_eq!(Format::from_path(Path::new("a/b.CSV")), Some(Format::Csv));
    assert_eq!(Format::from_path(Path::new("b.ndjson")), Some(Format::Jsonl));
    assert_eq!(Format::from_path(Path::new("b.txt")), None);
}
