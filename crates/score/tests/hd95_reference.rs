//! HD95, HD and ASSD against scipy: `tests/fixtures/score_hd95.json` is written by
//! `make_score_hd95` in scripts/fixtures.py with `scipy.ndimage.distance_transform_edt(sampling=
//! spacing)` and `np.percentile` (scripts/ref/score_surface.py) on seeded random label maps with
//! anisotropic spacing. The check asks for 0.01 mm; the comparison below is far tighter.

use ndarray::Array3;
use serde_json::Value;
use sinew_grid::{Grid, LabelMap};

fn map(case: &Value, key: &str, grid: &Grid) -> LabelMap {
    let s = grid.shape();
    let v: Vec<u16> = case[key].as_array().unwrap().iter().map(|x| x.as_u64().unwrap() as u16).collect();
    LabelMap::new(grid.clone(), Array3::from_shape_vec((s[0], s[1], s[2]), v).unwrap()).unwrap()
}

#[test]
fn surface_distances_match_scipy() {
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/../../tests/fixtures/score_hd95.json");
    let text = std::fs::read_to_string(path).expect("run python3 scripts/make_fixtures.py");
    let doc: Value = serde_json::from_str(&text).unwrap();
    let cases = doc["cases"].as_array().unwrap();
    assert_eq!(cases.len(), 3);
    let mut compared = 0;
    for case in cases {
        let shape: Vec<usize> =
            case["shape"].as_array().unwrap().iter().map(|x| x.as_u64().unwrap() as usize).collect();
        let spacing: Vec<f64> = case["spacing"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect();
        let grid =
            Grid::axis_aligned([shape[0], shape[1], shape[2]], [spacing[0], spacing[1], spacing[2]], [3.0, -2.0, 1.0]);
        let (a, b) = (map(case, "a", &grid), map(case, "b", &grid));
        let labels: Vec<u16> = case["labels"].as_array().unwrap().iter().map(|x| x.as_u64().unwrap() as u16).collect();
        let got = sinew_score::surface_distances(&a, &b, &labels).unwrap();
        for (l, s) in got {
            let want = &case["expected"][l.to_string()];
            match s {
                None => assert!(want.is_null(), "label {l}: sinew None, scipy {want}"),
                Some(s) => {
                    for (name, v) in [("hd95", s.hd95_mm), ("hd", s.hd_mm), ("assd", s.assd_mm)] {
                        let w = want[name].as_f64().unwrap();
                        assert!(approx::abs_diff_eq!(v, w, epsilon = 1e-9), "label {l} {name}: sinew {v}, scipy {w}");
                    }
                    compared += 1;
                }
            }
        }
    }
    assert!(compared >= 8, "only {compared} labels compared");
}
