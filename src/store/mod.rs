//! Registered images and their embeddings.
//!
//! [`images`] is the durable layer: an embedded SQLite file under the data
//! folder holding each image's bytes (so any bundle can embed it later, even
//! after a restart) and its embedding per bundle digest. [`memory`] is the
//! bounded in-memory layer in front of it, and the caption cache.
//! [`image_index`] answers "which registered images are nearest this vector".

pub mod image_index;
pub mod images;
pub mod memory;
