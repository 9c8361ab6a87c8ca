"""The fixed-point distribution family shared by training and the integer coder.

Each subpixel gets a discretised logistic. The network emits a mean in quarter pixels and a
log-scale in eighths; G's and B's means also move linearly with the channels already known,
through coupling coefficients in 64ths. These constants define that grid; changing any of
them changes every archive, so they are part of the format (docs/FORMAT.md).

One component, not a mixture: a mixture multiplies the cost of every 256-entry table by the
number of components, and the tables dominate coding time on a CPU (see DEVELOPERS.md).
"""

CHANNELS = 3  # the network always predicts R, G, B; gray images use the R head alone

MU_SCALE = 4  # mean resolution: 1/4 pixel
MU_CENTRE = 510  # mu4 = 510 + round(512 * raw): raw 0 means 127.5 px
MU_GAIN = 512
MU_LO = -16  # -4 px
MU_HI = 1036  # 259 px

LS_SCALE = 8  # log-scale resolution: 1/8 (natural log)
LS_LO = -20  # scale exp(-2.5) ~ 0.08 px
LS_HI = 35  # scale exp(4.375) ~ 79 px

COUPLE_SCALE = 64  # coupling-coefficient resolution
COUPLE_MAX = 128  # |coefficient| <= 2

CDF_BITS = 16  # the CDF is an integer in [0, 2**16]; each value's count gets +1 on top

# Output layout of the network's last layer: (mu, log-scale) for R, G, B, then the
# couplings G<-R, B<-R, B<-G.
OUTPUTS = 2 * CHANNELS + 3


def output_gains() -> list[float]:
    """Factor from the last layer's real output to each integer parameter, in layout order."""
    return [MU_GAIN, LS_SCALE] * CHANNELS + [COUPLE_SCALE] * 3
