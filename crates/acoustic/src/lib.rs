//! Acoustic model: a TDNN over feature frames trained with the CTC criterion on CPU.
#![deny(missing_docs)]
