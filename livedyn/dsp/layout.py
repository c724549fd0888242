"""Where each piece of kernel state lives.

Every fused kernel has the signature ``kernel(x, key, out, p, st, ring, tr)``:

``x``     float32 (frames, channels) main input
``key``   float32 (frames, key_channels) key input (the caller passes ``x`` when the key is main)
``out``   float32 (frames, channels) output, written by the kernel
``p``     float64 (NPARAM,) parameter targets (see livedyn.params)
``st``    float64 (NROWS + 2 nstate, ncols) state; ``ncols = max(channels, key_channels, 12)``;
          rows from NROWS on hold a user algorithm's declared state, read as a C-ordered
          (2 ncols, nstate) block: key channel j's detector row starts at element
          ``NROWS * ncols + j * nstate`` of the flat array, gain channel g's smoother row at
          ``NROWS * ncols + (ncols + g) * nstate``; a whole kernel sees the first ncols rows
``ring``  float64 (ring_len, RING_COLS_PER_CHANNEL * channels) delay lines and limiter queues
``tr``    float64 (NTRACE, frames, ncols) per-stage trace, or shape (NTRACE, 0, ncols) for none

Rows of ``st`` hold scalars in column 0, filter coefficients in columns 0..4, and per-channel
state in column c.
"""

# Scalars (column 0).
S_READY = 0  # 0 until the first block has set every glide to its target
S_THR = 1
S_SLOPE = 2
S_KNEE = 3
S_MAKEUP = 4
S_RANGE = 5
S_MIX = 6
S_CEIL = 7
S_HYST = 8
S_NONFINITE = 9  # count of non-finite input samples replaced by 0
S_DCUR = 10  # current main-path delay, samples
S_DOLD = 11  # delay being faded out
S_XF = 12  # crossfade samples remaining
S_WPOS = 13  # ring write position
S_FRAMES = 14  # frames processed since reset
S_GR_MAX = 15  # largest gain reduction in the last block, dB (>= 0)
S_CLAMP = 16  # limiter: samples where the final clamp cut the smoothed gain by > 1e-9
S_AUTOMAKEUP_DB = 17
S_ATT = 18  # limiter: box length in use, samples
S_LOOK = 19  # limiter: hold window in use, samples
S_LIM_NGAIN = 23  # limiter: gain channels in use (1 linked, channels unlinked)
S_LIM_TP = 61  # limiter: true-peak detection in use

# Filter coefficients (columns 0..4 = b0, b1, b2, a1, a2).
C_HPF = 20
C_LPF = 21
C_BPF = 22

# Per-channel rows.
R_HPZ = 24  # and 25
R_LPZ = 26  # and 27
R_BPZ = 28  # and 29
R_MS = 30  # rms detector mean square, per key channel
R_ENV = 31  # linear-domain envelope, per gain channel
R_ENV1 = 32  # decoupled first stage (linear domain), per gain channel
R_Y = 33  # smoothed gain in dB, per gain channel
R_Y1 = 34  # decoupled first stage (log domain)
R_HOLD = 35  # hold samples left
R_OPEN = 36  # expander/gate open flag
R_FB = 37  # feedback: last output sample (before makeup), per main channel
R_MEAS = 38  # this sample's key measure (|k| or mean square), per key channel
R_GAIN = 39  # this sample's total gain, linear, per gain channel
R_DQ_HEAD = 40  # limiter deque head index, per gain channel
R_DQ_LEN = 41  # limiter deque length
R_BOX = 42  # limiter box running sum
R_G = 43  # limiter smoothed gain (linear)
R_TP = 44  # true-peak history, 12 rows (44..55), per main channel
R_TP_POS = 56
R_TAPS = 57  # true-peak interpolation taps, 4 rows (57..60) x 12 columns
NROWS = 64

RING_COLS_PER_CHANNEL = 5  # audio + 4 limiter columns per gain channel
RING_DQ_VAL = 0
RING_DQ_IDX = 1
RING_M = 2
RING_REQ = 3

# Trace rows.
T_KEY = 0  # filtered key, per key channel
T_LEVEL = 1  # detector level, dB, per gain channel
T_CURVE = 2  # gain computer output, dB
T_GAIN = 3  # smoothed gain, dB (before makeup)
T_TOTAL = 4  # gain applied to the main signal, dB (with makeup)
NTRACE = 5
TRACE_NAMES = ("key_filtered", "detector_db", "curve_db", "gain_db", "total_gain_db")
