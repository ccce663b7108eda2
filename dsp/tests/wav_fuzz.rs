//! Any byte string as a WAV file: a valid object or a clear error naming the file, never a panic, a hang or
//! an allocation out of proportion to the input. Runs without the test harness so a counting allocator can
//! watch every allocation the reader makes (the harness's own threads would muddy the count).

use breakdown_dsp::wav::{parse, Limits};
use proptest::prelude::*;
use proptest::test_runner::{Config, TestCaseError, TestRunner};
use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicUsize, Ordering};

/// Largest single allocation since the last reset (bytes).
static LARGEST: AtomicUsize = AtomicUsize::new(0);

struct Counting;

unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        LARGEST.fetch_max(layout.size(), Ordering::Relaxed);
        System.alloc(layout)
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        System.dealloc(ptr, layout)
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        LARGEST.fetch_max(new_size, Ordering::Relaxed);
        System.realloc(ptr, layout, new_size)
    }
}

#[global_allocator]
static ALLOCATOR: Counting = Counting;

/// The reader's own block buffer (2 channels x 8 bytes x 4096 frames) plus four bytes of f32 per input byte.
fn bound(input: usize) -> usize {
    2 * 8 * 4096 + 4 * input + 4096
}

fn check(bytes: &[u8]) -> Result<(), TestCaseError> {
    LARGEST.store(0, Ordering::Relaxed);
    let result = parse(bytes, "fuzz.wav", &Limits::default());
    let largest = LARGEST.load(Ordering::Relaxed);
    prop_assert!(
        largest <= bound(bytes.len()),
        "{} bytes in, one allocation of {largest} bytes",
        bytes.len()
    );
    match result {
        Ok(w) => {
            prop_assert!(matches!(w.audio.channels.len(), 1 | 2));
            let frames = w.audio.frames();
            prop_assert!(w.audio.channels.iter().all(|c| c.len() == frames));
            prop_assert!(w.audio.channels.iter().flatten().all(|x| x.is_finite()));
        }
        Err(e) => {
            prop_assert!(
                e.0.contains("fuzz.wav"),
                "message without the file name: {}",
                e.0
            );
            prop_assert!(!e.0.contains('\n'), "message on several lines: {}", e.0);
        }
    }
    Ok(())
}

/// A header that gets the reader past the RIFF check, so the fuzzer reaches the chunk walk and the decoder.
fn riff_prefix() -> impl Strategy<Value = Vec<u8>> {
    (
        prop::sample::select(vec![*b"RIFF", *b"RF64"]),
        any::<u32>(),
        prop::collection::vec(
            (
                prop::sample::select(vec![*b"fmt ", *b"data", *b"ds64", *b"LIST", *b"junk"]),
                any::<u32>(),
                prop::collection::vec(any::<u8>(), 0..64),
            ),
            0..5,
        ),
    )
        .prop_map(|(form, size, chunks)| {
            let mut v = form.to_vec();
            v.extend_from_slice(&size.to_le_bytes());
            v.extend_from_slice(b"WAVE");
            for (id, size, body) in chunks {
                v.extend_from_slice(&id);
                // Half the chunks state their real size, half a random one.
                let stated = if size % 2 == 0 {
                    body.len() as u32
                } else {
                    size
                };
                v.extend_from_slice(&stated.to_le_bytes());
                v.extend_from_slice(&body);
            }
            v
        })
}

/// A fmt chunk of any format the reader knows (or nearly), then a data chunk with a random stated size.
fn plausible() -> impl Strategy<Value = Vec<u8>> {
    (
        prop::sample::select(vec![1u16, 3, 0xFFFE, 2]),
        1u16..4,
        any::<u32>(),
        prop::sample::select(vec![8u16, 16, 24, 32, 64, 12]),
        any::<u32>(),
        prop::collection::vec(any::<u8>(), 0..600),
    )
        .prop_map(|(tag, channels, rate, bits, stated, data)| {
            let align = channels * bits / 8;
            let mut fmt = Vec::new();
            fmt.extend_from_slice(&tag.to_le_bytes());
            fmt.extend_from_slice(&channels.to_le_bytes());
            fmt.extend_from_slice(&rate.to_le_bytes());
            fmt.extend_from_slice(&rate.wrapping_mul(align as u32).to_le_bytes());
            fmt.extend_from_slice(&align.to_le_bytes());
            fmt.extend_from_slice(&bits.to_le_bytes());
            if tag == 0xFFFE {
                fmt.extend_from_slice(&22u16.to_le_bytes());
                fmt.extend_from_slice(&bits.to_le_bytes());
                fmt.extend_from_slice(&[0; 4]);
                fmt.extend_from_slice(&[3, 0]);
                fmt.extend_from_slice(&[0; 14]);
            }
            let mut v = b"RIFF\0\0\0\0WAVEfmt ".to_vec();
            v.extend_from_slice(&(fmt.len() as u32).to_le_bytes());
            v.extend_from_slice(&fmt);
            v.extend_from_slice(b"data");
            v.extend_from_slice(&stated.to_le_bytes());
            v.extend_from_slice(&data);
            v
        })
}

fn main() {
    let mut runner = TestRunner::new(Config {
        cases: 3000,
        failure_persistence: None,
        ..Config::default()
    });
    let mut failed = 0;
    let mut passed = 0;
    for (name, strategy) in [
        (
            "any bytes",
            prop::collection::vec(any::<u8>(), 0..2048).boxed(),
        ),
        ("RIFF chunks", riff_prefix().boxed()),
        ("plausible formats", plausible().boxed()),
    ] {
        match runner.run(&strategy, |bytes| check(&bytes)) {
            Ok(()) => {
                println!("test wav_fuzz::{name} ... ok");
                passed += 1;
            }
            Err(e) => {
                println!("test wav_fuzz::{name} ... FAILED: {e}");
                failed += 1;
            }
        }
    }
    // A header stating 4 GiB of 64-bit stereo float with 16 bytes behind it: the reservation must follow the
    // file, not the header.
    let mut huge = b"RIFF\xff\xff\xff\xffWAVEfmt \x10\0\0\0\x03\0\x02\0\x80\xbb\0\0\0\0\0\0\x10\0\x40\0data\xfe\xff\xff\xff"
        .to_vec();
    huge.extend_from_slice(&[0; 16]);
    match check(&huge) {
        Ok(()) => {
            println!("test wav_fuzz::huge declared size ... ok");
            passed += 1;
        }
        Err(e) => {
            println!("test wav_fuzz::huge declared size ... FAILED: {e}");
            failed += 1;
        }
    }
    println!("{passed} passed, {failed} failed");
    if failed > 0 {
        std::process::exit(1);
    }
}
