//! Bounded fuzzing of every input parser: frames in every pixel format, PNG/JPEG, the model manifest, the
//! session opening, Y4M and recording CSV. Seeded, so a failure replays; corpora under tests/corpus/.
