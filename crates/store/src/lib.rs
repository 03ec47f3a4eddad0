//! Where daymark's data lives: resolving locations to object stores (local folders by
//! default; `s3://`, `gs://`, `az://` with the `cloud` feature), listing a source's
//! `<day_partition>=YYYY-MM-DD/` partitions, and reading Parquet footers.

pub mod discover;
pub mod footer_cache;
mod local_listing;
pub mod location;

pub use discover::{
    list_days, read_footer, read_shape, DataFile, DiscoverError, Footer, Listing, SourceShape,
};
pub use footer_cache::{read_shape_cached, FooterCache, FooterReads};
pub use location::{resolve, Location, LocationError};
/// The object_store crate, re-exported so every daymark crate uses the same copy.
pub use object_store;
