// fieldbridge_counter.cpp - example firmware for a fieldbridge sensor board.
//
// What the board does: three relaxation oscillators (pitch antenna, volume antenna,
// and a reference with no antenna) each drive a hardware counter input. A periodic
// timer marks counting windows (20 ms by default). At each window boundary the timer
// interrupt latches all three counters at once; the main loop subtracts the previous
// latch and sends "<seq> <pitch> <volume> <ref>\n" (or the binary frame) over the USB
// serial port. docs/getting-started.md shows the wiring; docs/protocol.md specifies the
// frame formats; frame_format.h builds the bytes.
//
// The counters are never reset: they run freely and the firmware takes differences.
// That way the part of a pulse that straddles a window boundary is counted in the next
// window instead of being lost, so the long-run average is exact and the one-count
// quantisation error does not accumulate.
//
// This file is plain C++ (no library beyond the C headers) and talks to the hardware
// only through the five hal_* functions below. Write them for your microcontroller
// with its vendor's register headers; they are small:
//
//   hal_init(window_us)      configure the counter inputs (external clock source for
//                            three timers, or pin-change interrupts for slow
//                            oscillators), a periodic timer interrupt every window_us,
//                            and the serial port (USB serial ignores the baud rate;
//                            a UART should run at 115200 8N1 or faster).
//   hal_window_ready(latch)  true once per window: copies the counter values the timer
//                            interrupt latched at the window boundary into latch[] and
//                            clears the "ready" flag (with interrupts briefly disabled,
//                            so the three values belong to the same boundary).
//   hal_counter_bits()       width of the hardware counters: 16 or 32. With 16-bit
//                            counters a window must hold fewer than 65536 pulses:
//                            f_osc * window < 65536 (e.g. under 3.2 MHz at 20 ms).
//   hal_serial_write(d, n)   send n bytes; may block until they are queued.
//   hal_idle()               wait for the next interrupt (sleep), or just return.
//
// If your toolchain supplies main() itself and calls two hooks instead (one at start,
// one in a loop), move the body of main() below into those hooks.
//
// Build switches (-D on the compiler command line):
//   FB_WINDOW_US  counting window in microseconds. Whole mains periods reject hum:
//                 20000 for 50 Hz mains, 16667 for 60 Hz, 100000 for both.
//   FB_BINARY     1 for the binary (COBS + CRC) frame format, 0 (default) for text.

#include <stddef.h>
#include <stdint.h>

#include "../frame_format.h"

#ifndef FB_WINDOW_US
#define FB_WINDOW_US 20000u
#endif

#ifndef FB_BINARY
#define FB_BINARY 0
#endif

// Channel order on the wire: the rig file names them in the same order.
enum { CH_PITCH = 0, CH_VOLUME = 1, CH_REFERENCE = 2, FB_CHANNELS = 3 };

extern "C" {
void hal_init(uint32_t window_us);
bool hal_window_ready(uint32_t latch[FB_CHANNELS]);
uint8_t hal_counter_bits(void);
void hal_serial_write(const uint8_t *data, size_t len);
void hal_idle(void);
}

namespace {

struct Counter {
    uint32_t previous[FB_CHANNELS];
    uint32_t mask;    // counter width: differences are taken modulo 2^bits
    uint16_t seq;     // wraps at 65536, as the binary format's field does
    bool primed;      // false until the first latch gives a starting point
};

void counter_init(Counter &c, uint8_t bits)
{
    for (size_t i = 0; i < FB_CHANNELS; i++) {
        c.previous[i] = 0;
    }
    c.mask = (bits >= 32) ? 0xFFFFFFFFu : ((1u << bits) - 1u);
    c.seq = 0;
    c.primed = false;
}

// Turn one latch into one frame in out[0..cap); returns the bytes to send (0 for the
// very first latch, which only sets the starting point).
size_t counter_window(Counter &c, const uint32_t latch[FB_CHANNELS], uint8_t *out, size_t cap)
{
    uint32_t counts[FB_CHANNELS];
    for (size_t i = 0; i < FB_CHANNELS; i++) {
        // Unsigned subtraction wraps modulo 2^32; the mask reduces it to the counter's
        // own width, so a 16-bit counter rolling over between latches still gives the
        // right difference (as long as fewer than 2^16 pulses arrive per window).
        counts[i] = (latch[i] - c.previous[i]) & c.mask;
        c.previous[i] = latch[i];
    }
    if (!c.primed) {
        c.primed = true;
        return 0;
    }
    const uint16_t seq = c.seq++;
#if FB_BINARY
    return fb_format_binary(out, cap, seq, counts, FB_CHANNELS);
#else
    return fb_format_text(reinterpret_cast<char *>(out), cap, seq, counts, FB_CHANNELS);
#endif
}

// Room for the longer of the two formats.
constexpr size_t kFrameBytes =
    FB_TEXT_MAX(FB_CHANNELS) > FB_BINARY_MAX(FB_CHANNELS) ? FB_TEXT_MAX(FB_CHANNELS)
                                                          : FB_BINARY_MAX(FB_CHANNELS);

void send_banner()
{
#if !FB_BINARY
    // Lines starting with '#' are comments to the receiver (counted, not decoded); this
    // one tells a person watching the raw stream what they are looking at.
    static const char banner[] = "# counter firmware: seq pitch volume reference\n";
    hal_serial_write(reinterpret_cast<const uint8_t *>(banner), sizeof banner - 1);
#endif
}

}  // namespace

int main()
{
    static uint8_t frame[kFrameBytes];
    static Counter counter;

    hal_init(FB_WINDOW_US);
    counter_init(counter, hal_counter_bits());
    send_banner();

    for (;;) {
        uint32_t latch[FB_CHANNELS];
        if (!hal_window_ready(latch)) {
            hal_idle();
            continue;
        }
        const size_t n = counter_window(counter, latch, frame, sizeof frame);
        if (n > 0) {
            hal_serial_write(frame, n);
        }
    }
}
