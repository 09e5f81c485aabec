//! Raster and zone geometry on the cell grid: turning the shapes analysts send into cell sets.
//!
//! Owns the grid-level decoding of zones (rectangles today). Decodes the values it is handed: it
//! does no file or network IO and knows nothing of HTTP or async runtimes. It returns plain cell
//! indices; the engine's types check them against the raster.

pub mod rect;
