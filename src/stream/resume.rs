//! A broker workaround: checking that reading a partition taken over really starts at the
//! snapshot's offset.
//!
//! Some brokers (tansu 0.6, seen here) answer a fetch from an offset inside a record batch with
//! the *next* batch, silently skipping the rest of the one asked for. A snapshot's offset usually
//! falls inside a batch, so after taking a partition over the first message is checked: if it
//! lies beyond the resume offset, the partition is read again from further back (messages before
//! the resume offset are passed over) until a message at or before it arrives, or reading from
//! offset 0 shows the gap is real (compaction, markers).

/// Reading resumed at `target`; the consumer was last asked to read from `asked` (≤ target).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct ResumeCheck {
    target: i64,
    asked: i64,
}

/// What the first message read after taking a partition over says.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Verdict {
    /// Reading started at or before the resume offset: the check is done.
    Holds,
    /// The broker skipped past the resume offset: read again from this offset, and check again.
    ReadAgain(ResumeCheck),
}

impl ResumeCheck {
    /// A check for a partition resumed at `target` (> 0).
    pub fn new(target: i64) -> ResumeCheck {
        ResumeCheck { target, asked: target }
    }

    /// Where the consumer is to read from next, when the verdict was [`Verdict::ReadAgain`].
    pub fn asked(self) -> i64 {
        self.asked
    }

    /// Judges the first message read, at `offset`. Each step back reads four times further
    /// (at least 1 024 messages), down to offset 0.
    pub fn judge(self, offset: i64) -> Verdict {
        if offset <= self.target || self.asked == 0 {
            return Verdict::Holds;
        }
        let back = (4 * (self.target - self.asked)).max(1024);
        let asked = (self.target - back).max(0);
        tracing::info!(resume = self.target, first = offset, "the broker skipped past the resume offset; reading again from offset {asked}");
        Verdict::ReadAgain(ResumeCheck { target: self.target, asked })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_skip_past_the_resume_offset_reads_again_from_further_back_until_offset_zero() {
        let c = ResumeCheck::new(5_000);
        assert_eq!(c.judge(5_000), Verdict::Holds);
        assert_eq!(c.judge(4_990), Verdict::Holds, "messages before the resume offset are passed over");
        let Verdict::ReadAgain(c) = c.judge(5_100) else { panic!("a skip is seen") };
        assert_eq!(c.asked(), 5_000 - 1_024);
        let Verdict::ReadAgain(c) = c.judge(5_100) else { panic!("still skipped") };
        assert_eq!(c.asked(), 5_000 - 4 * 1_024);
        let Verdict::ReadAgain(c) = c.judge(5_100) else { panic!("still skipped") };
        assert_eq!(c.asked(), 0);
        assert_eq!(c.judge(5_100), Verdict::Holds, "read from offset 0: the gap is real");
    }
}
