//! Site configuration: the YAML file in, a fully checked [`model::Site`] out, or every
//! located diagnostic that stands in the way.

pub mod describe;
pub mod load;
pub mod model;
pub mod tariff;
pub mod values;
pub mod yaml;

pub use load::{LoadError, Loaded, SourceFile, load_file, load_str};
