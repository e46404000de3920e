//! The step types, one file each. Each file holds the step's constructor (which validates
//! its parameters), how it applies itself, its cost, and its file codec.

mod append;
mod concat;
mod const_scale;
mod cos_phase;
mod cos_sin;
mod count_sketch_fft;
mod dense;
mod gather;
mod kernel_block;
mod pad;
mod product;
mod rectify;
mod scale;
mod segment_product;
mod signs;
mod tile;
mod wht;

pub use append::Append;
pub use concat::Concat;
pub use const_scale::ConstScale;
pub use cos_phase::CosPhase;
pub use cos_sin::CosSin;
pub use count_sketch_fft::CountSketchFft;
pub use dense::Dense;
pub use gather::Gather;
pub use kernel_block::KernelBlock;
pub use pad::Pad;
pub use product::Product;
pub use rectify::{Heaviside, Relu};
pub use scale::Scale;
pub use segment_product::SegmentProduct;
pub use signs::Signs;
pub use tile::Tile;
pub use wht::Wht;
