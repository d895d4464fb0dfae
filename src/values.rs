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

fn chunks<const N: usize>(bytes: &[u8]) -> impl Iterator<Item = [u8; N]> + '_ {
    bytes
        .chunks_exact(N)
        .map(|c| c.try_into().expect("exact chunk"))
}

/// Decode little-endian float elements to f64 (exact). `None` for a non-float dtype.
pub fn decode_f64(dtype: Dtype, bytes: &[u8]) -> Option<Vec<f64>> {
    Some(match dtype {
        Dtype::F16 => chunks::<2>(bytes)
            .map(|b| f16::from_le_bytes(b).to_f64())
            .collect(),
        Dtype::BF16 => chunks::<2>(bytes)
            .map(|b| bf16::from_le_bytes(b).to_f64())
            .collect(),
        Dtype::F32 => chunks::<4>(bytes)
            .map(|b| f32::from_le_bytes(b) as f64)
            .collect(),
        Dtype::F64 => chunks::<8>(bytes).map(f64::from_le_bytes).collect(),
        _ => return None,
    })
}

/// Decode little-endian float elements to f32 (exact for F16/BF16/F32; F64 rounds).
pub fn decode_f32(dtype: Dtype, bytes: &[u8]) -> Option<Vec<f32>> {
    Some(match dtype {
        Dtype::F16 => chunks::<2>(bytes)
            .map(|b| f16::from_le_bytes(b).to_f32())
            .collect(),
        Dtype::BF16 => chunks::<2>(bytes)
            .map(|b| bf16::from_le_bytes(b).to_f32())
            .collect(),
        Dtype::F32 => chunks::<4>(bytes).map(f32::from_le_bytes).collect(),
        Dtype::F64 => chunks::<8>(bytes)
            .map(|b| f64::from_le_bytes(b) as f32)
            .collect(),
        _ => return None,
    })
}

/// Encode f32 values as little-endian elements of a float dtype, rounding to nearest even.
pub fn encode_f32(dtype: Dtype, values: &[f32]) -> Option<Vec<u8>> {
    let mut out = Vec::with_capacity(values.len() * dtype.bitsize() / 8);
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
        _ => return None,
    }
    Some(out)
}

/// Encode f64 values as little-endian elements of a float dtype, rounding to nearest even.
pub fn encode_f64(dtype: Dtype, values: &[f64]) -> Option<Vec<u8>> {
    let mut out = Vec::with_capacity(values.len() * dtype.bitsize() / 8);
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
        _ => return None,
    }
    Some(out)
}

/// Decode little-endian integer elements. `None` for a non-integer dtype; U64 values above
/// i64::MAX saturate (they can never be position ids).
pub fn decode_ints(dtype: Dtype, bytes: &[u8]) -> Option<Vec<i64>> {
    Some(match dtype {
        Dtype::I8 => bytes.iter().map(|&b| b as i8 as i64).collect(),
        Dtype::U8 => bytes.iter().map(|&b| b as i64).collect(),
        Dtype::I16 => chunks::<2>(bytes)
            .map(|b| i16::from_le_bytes(b) as i64)
            .collect(),
        Dtype::U16 => chunks::<2>(bytes)
            .map(|b| u16::from_le_bytes(b) as i64)
            .collect(),
        Dtype::I32 => chunks::<4>(bytes)
            .map(|b| i32::from_le_bytes(b) as i64)
            .collect(),
        Dtype::U32 => chunks::<4>(bytes)
            .map(|b| u32::from_le_bytes(b) as i64)
            .collect(),
        Dtype::I64 => chunks::<8>(bytes).map(i64::from_le_bytes).collect(),
        Dtype::U64 => chunks::<8>(bytes)
            .map(|b| i64::try_from(u64::from_le_bytes(b)).unwrap_or(i64::MAX))
            .collect(),
        _ => return None,
    })
}

/// Encode 0..n as little-endian integers of `dtype`; `None` if the dtype is not an integer
/// type or cannot hold n - 1.
pub fn encode_range(dtype: Dtype, n: usize) -> Option<Vec<u8>> {
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
        _ => return None,
    };
    if max > limit {
        return None;
    }
    let width = dtype.bitsize() / 8;
    let mut out = Vec::with_capacity(n * width);
    for i in 0..n as u64 {
        out.extend_from_slice(&i.to_le_bytes()[..width]);
    }
    Some(out)
}
