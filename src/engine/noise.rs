//! placeholder: being written
