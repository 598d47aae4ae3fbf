/* example_device: a POSIX program that is a corral rig on a serial line.
 *
 * It simulates a double integrator x'' = force (one output, limit 5 N;
 * channels x [m] and v [m/s]), announces itself with a hello, streams samples
 * at a fixed rate, applies commands and honours the command timeout (outputs
 * off and CORRAL_STATUS_COMMAND_TIMEOUT when commands stop).
 *
 *   example_device [--rate HZ] [--timeout S] [--seconds S] [TTY]
 *
 * With TTY (e.g. /dev/ttyUSB0 or one end of a socat pair) it opens that line
 * raw. Without, it creates a pseudo-terminal and prints "PTY <path>" on
 * stdout: point the host at serial:<path>. On exit (after --seconds, or on
 * SIGINT/SIGTERM) it prints one "SUMMARY ..." line of counters.
 *
 * Build: gcc -std=c99 -Wall -Wextra -Werror -pedantic -O2 -o example_device \
 *            example_device.c corral_device.c cobs.c crc16.c corral_msgpack.c */
#define _XOPEN_SOURCE 600

#include <errno.h>
#include <fcntl.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <termios.h>
#include <time.h>
#include <unistd.h>

#include "corral_device.h"

static volatile sig_atomic_t running = 1;

static void on_signal(int sig)
{
    (void)sig;
    running = 0;
}

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

static int make_raw(int fd)
{
    struct termios tio;
    if (tcgetattr(fd, &tio) != 0) {
        return -1;
    }
    tio.c_iflag &= ~(tcflag_t)(IGNBRK | BRKINT | PARMRK | ISTRIP | INLCR | IGNCR | ICRNL | IXON);
    tio.c_oflag &= ~(tcflag_t)OPOST;
    tio.c_lflag &= ~(tcflag_t)(ECHO | ECHONL | ICANON | ISIG | IEXTEN);
    tio.c_cflag &= ~(tcflag_t)(CSIZE | PARENB);
    tio.c_cflag |= CS8 | CLOCAL | CREAD;
    tio.c_cc[VMIN] = 0;
    tio.c_cc[VTIME] = 0;
    return tcsetattr(fd, TCSANOW, &tio);
}

static unsigned long write_drops = 0;

static void send_all(int fd, const uint8_t *buf, size_t n)
{
    ssize_t w;
    if (n == 0) {
        return;
    }
    w = write(fd, buf, n);
    if (w != (ssize_t)n) {
        write_drops++; /* host not reading: drop, the receiver resynchronises */
    }
}

int main(int argc, char **argv)
{
    double rate = 1000.0, timeout = 0.05, seconds = 0.0;
    const char *tty = NULL;
    int fd, slave = -1, i;
    static corral_device dev;
    corral_hello hello;
    uint8_t buf[CORRAL_MAX_FRAME + 1];
    uint8_t rx[512];
    double x = 0.0, v = 0.0, period, t0, t_end;
    struct timespec next;
    unsigned long samples = 0, timeouts = 0;
    uint32_t last_status = 0;

    for (i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--rate") == 0 && i + 1 < argc) {
            rate = atof(argv[++i]);
        } else if (strcmp(argv[i], "--timeout") == 0 && i + 1 < argc) {
            timeout = atof(argv[++i]);
        } else if (strcmp(argv[i], "--seconds") == 0 && i + 1 < argc) {
            seconds = atof(argv[++i]);
        } else if (argv[i][0] == '-') {
            fprintf(stderr, "usage: %s [--rate HZ] [--timeout S] [--seconds S] [TTY]\n", argv[0]);
            return 2;
        } else {
            tty = argv[i];
        }
    }
    if (rate <= 0.0 || timeout <= 0.0) {
        fprintf(stderr, "rate and timeout must be positive\n");
        return 2;
    }

    if (tty) {
        fd = open(tty, O_RDWR | O_NOCTTY | O_NONBLOCK);
        if (fd < 0 || make_raw(fd) != 0) {
            fprintf(stderr, "cannot open %s: %s\n", tty, strerror(errno));
            return 1;
        }
    } else {
        const char *name;
        fd = posix_openpt(O_RDWR | O_NOCTTY);
        if (fd < 0 || grantpt(fd) != 0 || unlockpt(fd) != 0 || (name = ptsname(fd)) == NULL) {
            fprintf(stderr, "cannot create a pseudo-terminal: %s\n", strerror(errno));
            return 1;
        }
        /* keep the slave open so writes never fail while no host is attached */
        slave = open(name, O_RDWR | O_NOCTTY);
        if (slave < 0 || make_raw(slave) != 0) {
            fprintf(stderr, "cannot open %s: %s\n", name, strerror(errno));
            return 1;
        }
        fcntl(fd, F_SETFL, fcntl(fd, F_GETFL) | O_NONBLOCK);
        printf("PTY %s\n", name);
        fflush(stdout);
    }
    signal(SIGINT, on_signal);
    signal(SIGTERM, on_signal);

    memset(&hello, 0, sizeof hello);
    hello.protocol = CORRAL_PROTOCOL_VERSION;
    strcpy(hello.rig_id, "c-example");
    hello.n_channels = hello.n_units = 2;
    strcpy(hello.channels[0], "x");
    strcpy(hello.channels[1], "v");
    strcpy(hello.units[0], "m");
    strcpy(hello.units[1], "m/s");
    hello.sample_rate_hz = rate;
    hello.n_output_names = hello.n_output_limits = hello.n_output_units = 1;
    strcpy(hello.output_names[0], "force");
    hello.output_limits[0] = 5.0;
    strcpy(hello.output_units[0], "N");
    hello.command_timeout_s = timeout;
    corral_device_init(&dev, &hello);

    period = 1.0 / rate;
    t0 = now_s();
    t_end = seconds > 0.0 ? t0 + seconds : 0.0;
    buf[0] = 0;
    send_all(fd, buf, 1); /* leading delimiter */
    send_all(fd, buf, corral_device_encode_hello(&dev, 0.0, buf, sizeof buf));
    clock_gettime(CLOCK_MONOTONIC, &next);

    while (running) {
        double t, u[CORRAL_MAX_OUTPUTS], y[2];
        uint32_t status;
        ssize_t r;

        next.tv_nsec += (long)(period * 1e9);
        while (next.tv_nsec >= 1000000000L) {
            next.tv_nsec -= 1000000000L;
            next.tv_sec++;
        }
        while (clock_nanosleep(CLOCK_MONOTONIC, TIMER_ABSTIME, &next, NULL) == EINTR && running) {
        }
        t = now_s() - t0;
        while ((r = read(fd, rx, sizeof rx)) > 0) {
            corral_device_feed(&dev, rx, (size_t)r, t);
        }
        if (dev.hello_requested) {
            dev.hello_requested = 0;
            buf[0] = 0; /* delimiter first: a host that just opened sees the hello whole */
            send_all(fd, buf, 1);
            send_all(fd, buf, corral_device_encode_hello(&dev, t, buf, sizeof buf));
        }
        status = corral_device_outputs(&dev, t, u);
        if ((status & CORRAL_STATUS_COMMAND_TIMEOUT) && !(last_status & CORRAL_STATUS_COMMAND_TIMEOUT)) {
            timeouts++;
        }
        last_status = status;
        v += u[0] * period;
        x += v * period;
        y[0] = x;
        y[1] = v;
        send_all(fd, buf, corral_device_encode_sample(&dev, t, y, 2, status, buf, sizeof buf));
        samples++;
        if (t_end > 0.0 && now_s() >= t_end) {
            break;
        }
    }
    printf("SUMMARY samples=%lu commands=%lu rejected=%lu timeouts=%lu stops=%lu hellos=%lu "
           "crc=%lu cobs=%lu decode=%lu unknown=%lu drops=%lu\n",
           samples, (unsigned long)dev.commands, (unsigned long)dev.rejected_commands, timeouts,
           (unsigned long)dev.stops, (unsigned long)dev.host_hellos,
           (unsigned long)dev.crc_errors, (unsigned long)dev.cobs_errors,
           (unsigned long)dev.decode_errors, (unsigned long)dev.unknown_kinds, write_drops);
    fflush(stdout);
    if (slave >= 0) {
        close(slave);
    }
    close(fd);
    return 0;
}
