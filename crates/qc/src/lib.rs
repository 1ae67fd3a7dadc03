//! Pictures a person checks: the quality-control sheet of one registered pair and the plots
//! of a cohort report.
//!
//! - [`render_qc_sheet`] draws the axial, coronal and sagittal planes through one voxel with
//!   the fixed scan, the moving scan before and after warping, a colour overlay, the
//!   deformation grid and the Jacobian determinant (folds marked), plus label outlines and a
//!   title with the key figures; [`write_png`] saves it atomically.
//! - [`report`] reads a cohort's score table and writes one self-contained HTML report
//!   (inline SVG plots) plus the same plots as PNG files.
//!
//! Panels respect voxel spacing: every panel uses the same pixel size in mm (see [`plane`]).
#![deny(missing_docs)]

pub mod canvas;
pub mod colour;
mod error;
pub mod plane;
pub mod report;
pub mod sheet;

pub use canvas::{write_png, Rgb, RgbImage};
pub use error::QcError;
pub use plane::{PlaneGeometry, PlaneKind};
pub use sheet::{render_qc_sheet, Column, KeyFigures, Panel, QcInput, QcOptions, QcSheet, Window};
pub use sheet::{resolve_window, whole_body_label, ColourBarLayout, LegendEntry, ResolvedWindow, WindowRule};
