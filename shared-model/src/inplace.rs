//! Decoding a postcard payload into an existing [`Model`], field by field.
//!
//! `postcard::from_bytes::<Model>` builds the whole model (about 22 KiB, most
//! of it the 16 KiB whitening matrix and the 4 KiB loadings vector) as a value
//! and moves it through several frames on its way out, which costs a device
//! tens of KiB of stack. The seed
//! here writes every field where it already lives instead: small fields
//! (identity, dimensions, θ, monitor parameters) are decoded as values and
//! assigned; each `heapless::Vec<f32, N>` is cleared and filled element by
//! element. The bytes read are exactly those of the derived `Deserialize`
//! (postcard encodes a struct as the tuple of its fields, a vector as a
//! varint length and its elements), and tests hold the two decoders to the
//! same result.

use crate::Model;
use core::fmt;
use core::marker::PhantomData;
use serde::de::{self, DeserializeSeed, Deserializer, SeqAccess, Visitor};
use serde::Deserialize;

/// Decodes a `Model` into `&mut Model`. For sequence formats (postcard):
/// fields are read in declaration order.
pub(crate) struct ModelSeed<'a>(pub(crate) &'a mut Model);

impl<'de> DeserializeSeed<'de> for ModelSeed<'_> {
    type Value = ();

    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<(), D::Error> {
        d.deserialize_struct("Model", FIELDS, self)
    }
}

/// Field names, for formats that ask (postcard does not).
const FIELDS: &[&str] = &[
    "meta",
    "dims",
    "mean",
    "scale",
    "loadings",
    "eigenvalues",
    "theta",
    "weights",
    "mix_means",
    "mix_variances",
    "monitor",
    "spe_center_by_mode",
    "spe_spread_by_mode",
    "resid_center",
    "resid_gain",
    "resid_limit",
    "resid_whiten",
    "slow_charts",
    "slow_limit",
];

impl<'de> Visitor<'de> for ModelSeed<'_> {
    type Value = ();

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a plumbline model")
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<(), A::Error> {
        // Destructured without `..`: a field added to `Model` fails to compile
        // here until it gets its line below, in declaration order.
        let Model {
            meta,
            dims,
            mean,
            scale,
            loadings,
            eigenvalues,
            theta,
            weights,
            mix_means,
            mix_variances,
            monitor,
            spe_center_by_mode,
            spe_spread_by_mode,
            resid_center,
            resid_gain,
            resid_limit,
            resid_whiten,
            slow_charts,
            slow_limit,
        } = self.0;
        let mut at = 0usize;
        field(&mut seq, &mut at, Assign(meta))?;
        field(&mut seq, &mut at, Assign(dims))?;
        field(&mut seq, &mut at, Fill::new(mean))?;
        field(&mut seq, &mut at, Fill::new(scale))?;
        field(&mut seq, &mut at, Fill::new(loadings))?;
        field(&mut seq, &mut at, Fill::new(eigenvalues))?;
        field(&mut seq, &mut at, Assign(theta))?;
        field(&mut seq, &mut at, Fill::new(weights))?;
        field(&mut seq, &mut at, Fill::new(mix_means))?;
        field(&mut seq, &mut at, Fill::new(mix_variances))?;
        field(&mut seq, &mut at, Assign(monitor))?;
        field(&mut seq, &mut at, Fill::new(spe_center_by_mode))?;
        field(&mut seq, &mut at, Fill::new(spe_spread_by_mode))?;
        field(&mut seq, &mut at, Fill::new(resid_center))?;
        field(&mut seq, &mut at, Fill::new(resid_gain))?;
        field(&mut seq, &mut at, Assign(resid_limit))?;
        field(&mut seq, &mut at, Fill::new(resid_whiten))?;
        field(&mut seq, &mut at, Fill::new(slow_charts))?;
        field(&mut seq, &mut at, Assign(slow_limit))?;
        Ok(())
    }
}

/// Reads the next field with `seed`; a missing field is an error.
fn field<'de, A, S>(seq: &mut A, at: &mut usize, seed: S) -> Result<(), A::Error>
where
    A: SeqAccess<'de>,
    S: DeserializeSeed<'de, Value = ()>,
{
    let here = *at;
    *at += 1;
    seq.next_element_seed(seed)?
        .ok_or_else(|| de::Error::invalid_length(here, &"the fields of a plumbline model"))
}

/// A small field: decoded as a value, then assigned.
struct Assign<'a, T>(&'a mut T);

impl<'de, T: Deserialize<'de>> DeserializeSeed<'de> for Assign<'_, T> {
    type Value = ();

    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<(), D::Error> {
        *self.0 = T::deserialize(d)?;
        Ok(())
    }
}

/// A fixed-capacity vector of `f32`: cleared, then filled one element at a
/// time. More elements than its capacity is an error, as with the derived
/// decoder. Held as a view (capacity known at run time), so the vectors of
/// every capacity share one decoder: on a board each capacity of its own
/// cost a copy of this code.
struct Fill<'a>(&'a mut heapless::vec::VecView<f32>);

impl<'a> Fill<'a> {
    fn new<const N: usize>(v: &'a mut heapless::Vec<f32, N>) -> Self {
        Fill(v.as_mut_view())
    }
}

impl<'de> DeserializeSeed<'de> for Fill<'_> {
    type Value = ();

    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<(), D::Error> {
        d.deserialize_seq(self)
    }
}

impl<'de> Visitor<'de> for Fill<'_> {
    type Value = ();

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "at most {} numbers", self.0.capacity())
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<(), A::Error> {
        self.0.clear();
        while let Some(v) = seq.next_element_seed(PhantomData::<f32>)? {
            if self.0.push(v).is_err() {
                return Err(de::Error::invalid_length(self.0.capacity() + 1, &self));
            }
        }
        Ok(())
    }
}
