//! `dovetail match` on scored pairs.

use crate::common::*;

#[test]
fn finds_the_one_to_one_optimum() {
    // a-x 5, a-y 4, b-x 4, b-y 1: the optimum is a-y + b-x = 8, where picking the best pair
    // first (a-x) would give 5 + 1 = 6 (a hand-checked instance).
    let dir = tempfile::tempdir().unwrap();
    let pairs = write(
        dir.path(),
        "pairs.csv",
        "left_id,right_id,weight,source\na,x,5,m1\na,y,4,m1\nb,x,4,m2\nb,y,1,m2\nc,z,-2,m3\n",
    );
    let out = dir.path().join("out");
    let o = run(&[
        "match",
        "--pairs",
        pairs.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(String::from_utf8_lossy(&o.stdout).contains("total weight: 8"));
    let (head, rows) = read_csv(&out.join("links.csv"));
    assert_eq!(head, ["left_id", "right_id", "weight"]);
    assert_eq!(rows, [["a", "y", "4"], ["b", "x", "4"]]);
    // With --min-weight 4 only a-x is usable.
    let o = run(&[
        "match",
        "--pairs",
        pairs.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
        "--min-weight",
        "4",
    ]);
    assert!(String::from_utf8_lossy(&o.stdout).contains("total weight: 5"));
}

#[test]
fn bad_pairs_get_one_line_errors() {
    let dir = tempfile::tempdir().unwrap();
    for (text, want) in [
        (
            "left_id,right_id,weight\na,x,1\na,x,2\n",
            "line 3: duplicate pair (first given on line 2)",
        ),
        (
            "left_id,right_id,weight\na,x,heavy\n",
            "line 2: column weight: `heavy` is not a number",
        ),
        (
            "left_id,right_id,weight\na,x,inf\n",
            "line 2: column weight: weight `inf` is not finite",
        ),
    ] {
        let pairs = write(dir.path(), "p.csv", text);
        let out = dir.path().join("out");
        let o = run(&[
            "match",
            "--pairs",
            pairs.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ]);
        assert_eq!(o.status.code(), Some(1));
        let e = stderr(&o);
        assert_eq!(e.lines().count(), 1, "{e}");
        assert!(e.starts_with("error: ") && e.contains(want), "{e}");
        assert!(files_in(&out).is_empty());
    }
}
