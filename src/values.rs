//! Element decoding and encoding for the dtypes posgrid computes on. Floats are widened
//! exactly; narrowing rounds to nearest, ties to even (what `half` implements for F16/BF16
//! and what `as f32` does for F64).

use half::{bf16, f16};

use crate::checkpoint::Dtype;

/// Whether posgrid can resample tables of this dtype.
pub fn is_float(dtype: Dtype) -> bool {
    matches!(dtype, Dtype::F16 | Dtype::BF16 | Dtype::F32 | Dtype::F64)
}

/// Whether this dtype holds integers (position-id buffers).
pub fn is_integer(dtype: Dtype) -> bool {
    matches!(
        dtype,
        Dtype::I8
            | Dtype::U8
            | Dtype::I16
            | Dtype::U16
            | Dtype::I32
            | Dtype::U32
            | Dtype::I64
            | Dtype::U64
    )
}

/// A buffer whose size the input decides could not be allocated (the machine's memory or an
/// address-space limit is smaller than the request).
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
#[error("cannot allocate {} MiB", bytes.div_ceil(1 << 20))]
pub struct OutOfMemory {
    pub bytes: usize,
}

/// An empty vector with room for `n` elements, or the reason it cannot have it.
pub fn try_with_capacity<T>(n: usize) -> Result<Vec<T>, OutOfMemory> {
    let bytes = n.saturating_mul(std::mem::size_of::<T>());
    let mut v = Vec::new();
    v.try_reserve_exact(n).map_err(|_| OutOfMemory { bytes })?;
    Ok(v)
}

/// `n` copies of `value`, allocated fallibly.
pub fn try_filled<T: Clone>(n: usize, value: T) -> Result<Vec<T>, OutOfMemory> {
    let mut v = try_with_capacity(n)?;
    v.resize(n, value);
    Ok(v)
}

/// Collect an iterator of known length into a fallibly allocated vector.
pub fn try_collect<T>(n: usize, items: impl Iterator<Item = T>) -> Result<Vec<T>, OutOfMemory> {
    let mut v = try_with_capacity(n)?;
    v.extend(items.take(n));
    Ok(v)
}

/// The transpose of a row-major `[rows, cols]` matrix, fallibly allocated.
pub fn transpose<T: Copy>(v: &[T], rows: usize, cols: usize) -> Result<Vec<T>, OutOfMemory> {
    try_collect(
        rows * cols,
        (0..cols).flat_map(|c| (0..rows).map(move |r| v[r * cols + c])),
    )
}

fn chunks<const N: usize>(bytes: &[u8]) -> impl Iterator<Item = [u8; N]> + '_ {
    bytes
        .chunks_exact(N)
        .map(|c| c.try_into().expect("exact chunk"))
}

/// Why values could not be decoded or encoded.
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
pub enum ValueError {
    #[error("dtype is not a float type")]
    NotFloat,
    #[error("dtype is not an integer type")]
    NotInteger,
    #[error("dtype cannot hold the values")]
    OutOfRange,
    #[error(transparent)]
    OutOfMemory(#[from] OutOfMemory),
}

/// Decode little-endian float elements to f64 (exact).
pub fn decode_f64(dtype: Dtype, bytes: &[u8]) -> Result<Vec<f64>, ValueError> {
    let n = bytes.len() / (dtype.bitsize() / 8).max(1);
    Ok(match dtype {
        Dtype::F16 => try_collect(
            n,
            chunks::<2>(bytes).map(|b| f16::from_le_bytes(b).to_f64()),
        )?,
        Dtype::BF16 => try_collect(
            n,
            chunks::<2>(bytes).map(|b| bf16::from_le_bytes(b).to_f64()),
        )?,
        Dtype::F32 => try_collect(n, chunks::<4>(bytes).map(|b| f32::from_le_bytes(b) as f64))?,
        Dtype::F64 => try_collect(n, chunks::<8>(bytes).map(f64::from_le_bytes))?,
        _ => return Err(ValueError::NotFloat),
    })
}

/// Decode little-endian float elements to f32 (exact for F16/BF16/F32; F64 rounds).
pub fn decode_f32(dtype: Dtype, bytes: &[u8]) -> Result<Vec<f32>, ValueError> {
    let n = bytes.len() / (dtype.bitsize() / 8).max(1);
    Ok(match dtype {
        Dtype::F16 => try_collect(
            n,
            chunks::<2>(bytes).map(|b| f16::from_le_bytes(b).to_f32()),
        )?,
        Dtype::BF16 => try_collect(
            n,
            chunks::<2>(bytes).map(|b| bf16::from_le_bytes(b).to_f32()),
        )?,
        Dtype::F32 => try_collect(n, chunks::<4>(bytes).map(f32::from_le_bytes))?,
        Dtype::F64 => try_collect(n, chunks::<8>(bytes).map(|b| f64::from_le_bytes(b) as f32))?,
        _ => return Err(ValueError::NotFloat),
    })
}

/// The number of NaN or infinite elements in little-endian float bytes (0 for other dtypes).
pub fn count_nonfinite(dtype: Dtype, bytes: &[u8]) -> usize {
    match dtype {
        Dtype::F16 => chunks::<2>(bytes)
            .filter(|b| !f16::from_le_bytes(*b).is_finite())
            .count(),
        Dtype::BF16 => chunks::<2>(bytes)
            .filter(|b| !bf16::from_le_bytes(*b).is_finite())
            .count(),
        Dtype::F32 => chunks::<4>(bytes)
            .filter(|b| !f32::from_le_bytes(*b).is_finite())
            .count(),
        Dtype::F64 => chunks::<8>(bytes)
            .filter(|b| !f64::from_le_bytes(*b).is_finite())
            .count(),
        _ => 0,
    }
}

/// Append f32 values to `out` as little-endian elements of a float dtype, rounding to nearest
/// even. `out` must have room (the caller allocates fallibly).
pub fn encode_f32_into(dtype: Dtype, values: &[f32], out: &mut Vec<u8>) -> Result<(), ValueError> {
    match dtype {
        Dtype::F16 => values
            .iter()
            .for_each(|v| out.extend(f16::from_f32(*v).to_le_bytes())),
        Dtype::BF16 => values
            .iter()
            .for_each(|v| out.extend(bf16::from_f32(*v).to_le_bytes())),
        Dtype::F32 => values.iter().for_each(|v| out.extend(v.to_le_bytes())),
        Dtype::F64 => values
            .iter()
            .for_each(|v| out.extend((*v as f64).to_le_bytes())),
        _ => return Err(ValueError::NotFloat),
    }
    Ok(())
}

/// Append f64 values to `out` as little-endian elements of a float dtype, rounding to nearest
/// even. `out` must have room (the caller allocates fallibly).
pub fn encode_f64_into(dtype: Dtype, values: &[f64], out: &mut Vec<u8>) -> Result<(), ValueError> {
    match dtype {
        Dtype::F16 => values
            .iter()
            .for_each(|v| out.extend(f16::from_f64(*v).to_le_bytes())),
        Dtype::BF16 => values
            .iter()
            .for_each(|v| out.extend(bf16::from_f64(*v).to_le_bytes())),
        Dtype::F32 => values
            .iter()
            .for_each(|v| out.extend((*v as f32).to_le_bytes())),
        Dtype::F64 => values.iter().for_each(|v| out.extend(v.to_le_bytes())),
        _ => return Err(ValueError::NotFloat),
    }
    Ok(())
}

/// Encode f32 values as little-endian elements of a float dtype, rounding to nearest even.
pub fn encode_f32(dtype: Dtype, values: &[f32]) -> Result<Vec<u8>, ValueError> {
    let mut out = try_with_capacity(values.len() * dtype.bitsize() / 8)?;
    encode_f32_into(dtype, values, &mut out)?;
    Ok(out)
}

/// Encode f64 values as little-endian elements of a float dtype, rounding to nearest even.
pub fn encode_f64(dtype: Dtype, values: &[f64]) -> Result<Vec<u8>, ValueError> {
    let mut out = try_with_capacity(values.len() * dtype.bitsize() / 8)?;
    encode_f64_into(dtype, values, &mut out)?;
    Ok(out)
}

/// Decode little-endian integer elements. U64 values above i64::MAX saturate (they can never
/// be position ids).
pub fn decode_ints(dtype: Dtype, bytes: &[u8]) -> Result<Vec<i64>, ValueError> {
    let n = bytes.len() / (dtype.bitsize() / 8).max(1);
    Ok(match dtype {
        Dtype::I8 => try_collect(n, bytes.iter().map(|&b| b as i8 as i64))?,
        Dtype::U8 => try_collect(n, bytes.iter().map(|&b| b as i64))?,
        Dtype::I16 => try_collect(n, chunks::<2>(bytes).map(|b| i16::from_le_bytes(b) as i64))?,
        Dtype::U16 => try_collect(n, chunks::<2>(bytes).map(|b| u16::from_le_bytes(b) as i64))?,
        Dtype::I32 => try_collect(n, chunks::<4>(bytes).map(|b| i32::from_le_bytes(b) as i64))?,
        Dtype::U32 => try_collect(n, chunks::<4>(bytes).map(|b| u32::from_le_bytes(b) as i64))?,
        Dtype::I64 => try_collect(n, chunks::<8>(bytes).map(i64::from_le_bytes))?,
        Dtype::U64 => try_collect(
            n,
            chunks::<8>(bytes).map(|b| i64::try_from(u64::from_le_bytes(b)).unwrap_or(i64::MAX)),
        )?,
        _ => return Err(ValueError::NotInteger),
    })
}

/// Whether `dtype` is an integer type that can hold 0..n - 1.
pub fn range_fits(dtype: Dtype, n: usize) -> bool {
    let max = n.saturating_sub(1) as u128;
    let limit: u128 = match dtype {
        Dtype::I8 => i8::MAX as u128,
        Dtype::U8 => u8::MAX as u128,
        Dtype::I16 => i16::MAX as u128,
        Dtype::U16 => u16::MAX as u128,
        Dtype::I32 => i32::MAX as u128,
        Dtype::U32 => u32::MAX as u128,
        Dtype::I64 => i64::MAX as u128,
        Dtype::U64 => u64::MAX as u128,
        _ => return false,
    };
    max <= limit
}

/// Encode 0..n as little-endian integers of `dtype`.
pub fn encode_range(dtype: Dtype, n: usize) -> Result<Vec<u8>, ValueError> {
    if !range_fits(dtype, n) {
        return Err(ValueError::OutOfRange);
    }
    encode_counts(dtype, n, 0..n as u64)
}

/// Encode non-negative integers (indices) as little-endian integers of `dtype`.
pub fn encode_indices(dtype: Dtype, values: &[i64]) -> Result<Vec<u8>, ValueError> {
    let max = values.iter().copied().max().unwrap_or(0);
    if values.iter().any(|v| *v < 0) {
        return Err(ValueError::OutOfRange);
    }
    let fits = usize::try_from(max).is_ok_and(|m| range_fits(dtype, m.saturating_add(1)));
    if !fits {
        return Err(ValueError::OutOfRange);
    }
    encode_counts(dtype, values.len(), values.iter().map(|v| *v as u64))
}

/// `n` values, each already checked to fit `dtype`, as little-endian integers.
fn encode_counts(
    dtype: Dtype,
    n: usize,
    values: impl Iterator<Item = u64>,
) -> Result<Vec<u8>, ValueError> {
    let width = dtype.bitsize() / 8;
    let mut out = try_with_capacity(n.saturating_mul(width))?;
    for i in values {
        out.extend_from_slice(&i.to_le_bytes()[..width]);
    }
    Ok(out)
}

/// The refusal for a buffer that could not be allocated: what it was for, its size, and what
/// to do.
pub(crate) fn out_of_memory(
    path: &std::path::Path,
    what: &str,
    e: OutOfMemory,
) -> crate::error::Error {
    crate::error::Error::refused(
        path,
        format!(
            "{what}: {e} (the machine's free memory or the process's address-space limit is smaller than the table needs); free memory, or lower --memory-limit so such tables are refused up front"
        ),
    )
}

/// A decoding or encoding failure as a run error: out of memory is a refusal; a dtype that is
/// not a number type here is a table problem.
pub(crate) fn value_error(
    path: &std::path::Path,
    what: &str,
    e: ValueError,
) -> crate::error::Error {
    match e {
        ValueError::OutOfMemory(m) => out_of_memory(path, what, m),
        other => crate::error::Error::table(path, format!("{what}: {other}")),
    }
}
