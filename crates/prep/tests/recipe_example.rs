//! The example recipe shipped in `examples/prep_recipe.toml` parses and describes the
//! documented pipeline onto the 144×112×192 grid of 2 mm.

use std::path::Path;

use sinew_prep::{Centre, Recipe, Resample, Scale};

#[test]
fn example_recipe_describes_the_working_grid() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../examples/prep_recipe.toml");
    let steps = Recipe::load(&path).unwrap().steps().unwrap();
    assert_eq!(steps.orient.unwrap().to_string(), "RAS");
    assert_eq!(steps.resample, Some(Resample::Spacing([2.0, 2.0, 2.0])));
    let cp = steps.crop_pad.unwrap();
    assert_eq!((cp.shape, cp.centre, cp.pad), ([144, 112, 192], Centre::Body, None));
    assert_eq!(steps.window.map(|w| (w.lo, w.hi)), Some((-1000.0, 1500.0)));
    assert_eq!(steps.scale, Scale::Unit);
    assert!(steps.mask && steps.body.fill_holes && steps.body.threshold == -500.0);
}
