//! Pair lists (`--pairs`, a manifest's `[[pair]]` tables) and an imported method's runtimes.

use sinew_grid::Field;
use sinew_testkit::{ok, p, Sinew};

const SINEW: Sinew = Sinew::new(env!("CARGO_BIN_EXE_sinew"));

#[test]
fn a_pair_list_in_both_directions_scores_an_imported_method_with_its_runtimes() {
    let tmp = sinew_testkit::tempdir();
    let t = tmp.path();
    let demo = t.join("demo");
    SINEW.demo(&demo, 3, &["--data-only"]);
    let list = t.join("test_pairs.csv");
    std::fs::write(&list, "fixed,moving\nsubject_02,subject_00\nsubject_00,subject_02\nsubject_01,subject_00\n")
        .unwrap();
    // --list: the list's order is the pair index; both directions are separate pairs.
    let listed = ok(SINEW.run(["cohort", "--all-pairs", p(&demo), "--pairs", p(&list), "--out", "x", "--list"]));
    assert_eq!(
        String::from_utf8(listed.stdout).unwrap(),
        "0\tsubject_02\tsubject_00\n1\tsubject_00\tsubject_02\n2\tsubject_01\tsubject_00\n"
    );
    let shard = ok(SINEW.run([
        "cohort",
        "--all-pairs",
        p(&demo),
        "--pairs",
        p(&list),
        "--out",
        "x",
        "--list",
        "--shard",
        "2/2",
    ]));
    assert_eq!(String::from_utf8(shard.stdout).unwrap(), "1\tsubject_00\tsubject_02\n");

    // Zero fields (the identity map) of an imported method: warped = moving labels resampled,
    // so Dice after equals Dice before exactly.
    let grid = sinew_io::read_labels(&demo.join("subject_00_labels.nii.gz")).unwrap().grid;
    let fields = t.join("fields");
    std::fs::create_dir(&fields).unwrap();
    for name in ["subject_02__subject_00", "subject_00__subject_02", "subject_01__subject_00"] {
        sinew_io::write_npy_field(&fields.join(format!("{name}.npy")), &Field::zeros(grid.clone())).unwrap();
    }
    let times = t.join("times.csv");
    std::fs::write(&times, "fixed,moving,runtime_s\nsubject_02,subject_00,0.25\nsubject_00,subject_02,0.5\n").unwrap();
    let out = t.join("runs");
    // The imported method's run over the list, with its fields and runtimes.
    let import = || {
        let mut args = vec!["cohort", "--all-pairs", p(&demo), "--pairs", p(&list), "--out", p(&out)];
        args.extend(["--method", "net", "--fields", p(&fields), "--runtimes", p(&times), "-q"]);
        SINEW.run(args)
    };
    ok(import());
    let mut rdr = csv::Reader::from_path(out.join("scores.csv")).unwrap();
    let header = rdr.headers().unwrap().clone();
    let col = |name: &str| header.iter().position(|h| h == name).unwrap();
    let rows: Vec<csv::StringRecord> = rdr.records().map(Result::unwrap).collect();
    assert_eq!(rows.len(), 3 * 10, "3 pairs × 10 labels");
    for r in &rows {
        let pair: usize = r[col("pair")].parse().unwrap();
        let (fixed, moving) = (&r[col("fixed")], &r[col("moving")]);
        let want = [
            ("subject_02", "subject_00", "0.25"),
            ("subject_00", "subject_02", "0.5"),
            ("subject_01", "subject_00", ""),
        ];
        assert_eq!((fixed, moving, &r[col("runtime_s")]), want[pair], "row {r:?}");
        assert_eq!(&r[col("method")], "net");
        assert_eq!(r[col("dice")], r[col("dice_before")], "identity field: {r:?}");
    }
    let summary: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("summary.json")).unwrap()).unwrap();
    // Mean of the known runtimes over the pairs that have one: (0.25 + 0.5) / 2.
    assert_eq!(summary["methods"][0]["runtime_mean_s"].as_f64(), Some(0.375));

    // Bad lists: one line naming the file and the problem, exit code 2.
    for (text, says) in [("fixed,moving\nsubject_00,nobody\n", "nobody"), ("a,b\nx,y\n", "header")] {
        std::fs::write(&list, text).unwrap();
        let r = SINEW.run(["cohort", "--all-pairs", p(&demo), "--pairs", p(&list), "--out", "x", "--list"]);
        let err = String::from_utf8_lossy(&r.stderr);
        assert_eq!(r.status.code(), Some(2));
        assert!(err.contains("test_pairs.csv") && err.contains(says) && err.lines().count() == 1, "{err}");
    }
    std::fs::write(&times, "fixed,moving,runtime_s\nsubject_02,subject_00,fast\n").unwrap();
    std::fs::write(&list, "fixed,moving\nsubject_02,subject_00\n").unwrap();
    let r = import();
    assert_eq!(r.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&r.stderr).contains("times.csv:2"), "{}", String::from_utf8_lossy(&r.stderr));
}
