//! The native module of the `posgrid` Python package: thin bindings over the posgrid library,
//! which stays free of Python. Arguments are checked here with Python's exception types;
//! the work runs in the library with the GIL released.

mod args;
mod errors;
mod files;
mod maps;
mod resample;
mod tables;

use pyo3::prelude::*;

#[pymodule]
fn _posgrid(m: &Bound<'_, PyModule>) -> PyResult<()> {
    // The package's version is the bindings crate's, which equals the library's.
    m.add("__version__", env!("CARGO_PKG_VERSION"))?;
    m.add("core_version", posgrid::VERSION)?;
    m.add_function(wrap_pyfunction!(files::scan, m)?)?;
    m.add_function(wrap_pyfunction!(files::resize, m)?)?;
    m.add_function(wrap_pyfunction!(resample::resample, m)?)?;
    m.add_function(wrap_pyfunction!(maps::similarity, m)?)?;
    m.add_function(wrap_pyfunction!(maps::fidelity, m)?)?;
    m.add_function(wrap_pyfunction!(maps::draw_maps, m)?)?;
    Ok(())
}
