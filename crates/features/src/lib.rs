//! Acoustic front end: MFCC and log-mel fbank features, deltas, CMVN and SpecAugment masks.
#![deny(missing_docs)]
