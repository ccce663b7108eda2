//! WAV reading and writing (being written).
