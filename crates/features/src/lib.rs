//! Image features for registration: the MIND-SSC descriptor, and the intensity descriptors of
//! the intensity-based data terms (SSD, local NCC).
//!
//! A descriptor turns each voxel of a scan into a short vector that describes its local
//! structure and not its intensity, so that two scans of different contrast can be compared
//! with a plain sum of squared differences between their descriptors.
//!
//! # References
//! - "MIND: Modality independent neighbourhood descriptor for multi-modal deformable
//!   registration", Medical Image Analysis 16(7), 2012. doi:10.1016/j.media.2012.05.008
//! - "Towards realtime multimodal fusion for image-guided interventions using
//!   self-similarities", MICCAI 2013, LNCS 8149. doi:10.1007/978-3-642-40811-3_24
#![deny(missing_docs)]

mod error;
pub mod intensity;
pub mod mind;

pub use error::FeatureError;
pub use intensity::{intensity_descriptor, local_standardised, DescriptorKind};
pub use mind::{mind_ssc, mind_ssc_into, Descriptor, MindParams, MindScratch, SIX_NEIGHBOURS, SSC_CHANNELS, SSC_PAIRS};
