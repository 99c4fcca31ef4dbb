/*
 * pump.c - a hand-written backpropagation of the INVENTED centrifugal-pump state classifier
 * (normal, cavitating, bearing wear from four invented sensor readings), in C99, for `plumb probe`.
 *
 * The network is examples/pump.toml: 4 inputs -> 8 tanh -> 6 tanh -> 3 softmax, cross-entropy,
 * l2 = 0.01, augmented layout (layerJ is units x (inputs + 1), column 0 multiplies the bias unit).
 * It speaks plumb's wire protocol version 1 (docs/protocol.md) on stdin/stdout, in float64 only.
 * Messages for people go to stderr: stdout belongs to the protocol.
 *
 *   pump [--plant CODE[:N]]
 *
 * CODE is one of docs/mistakes.md's codes:
 *   sign-flipped, missing-batch-mean, bias-gradient-missing   N = the only layer made wrong (1..3);
 *                                                              without it, every layer
 *   activation-derivative-missing                              N = the hidden layer k (1 or 2,
 *                                                              default 1); layers 1..k change
 *
 * Build: make (cc -O2 -std=c99 -Wall -Wextra -o pump pump.c -lm). No libraries beyond libm.
 */
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define LAYERS 3
static const int SIZE[LAYERS + 1] = {4, 8, 6, 3};
static const double L2 = 0.01;
static const char *NAME = "pump-c";

enum plant { NONE, SIGN_FLIPPED, MISSING_BATCH_MEAN, BIAS_GRADIENT_MISSING, ACTIVATION_DERIVATIVE_MISSING };
static enum plant planted = NONE;
static int plant_at = 0; /* the layer (whole-network codes, 0 = all) or the hidden layer k */

/* The loaded parameters and data, and the work space of a forward/backward pass. */
static double *theta[LAYERS], *work[LAYERS], *grad[LAYERS];
static double *xs, *ys;
static long m;
static double *act[LAYERS + 1]; /* act[j]: what layer j + 1 reads (act[0] = x); act[LAYERS] = p */
static double *logit;           /* the output layer's pre-activations */
static double *delta, *delta_next;

static int rows(int j) { return SIZE[j + 1]; }
static int cols(int j) { return SIZE[j] + 1; }

/* ---- errors: an "error" reply ends the session (the messages hold no quotes) ---- */

static void fail(const char *what)
{
    printf("{\"type\":\"error\",\"message\":\"%s: %s\"}\n", NAME, what);
    fflush(stdout);
    fprintf(stderr, "%s: %s\n", NAME, what);
    exit(1);
}

/* Zeroed room for count values of size bytes each. */
static void *alloc(size_t count, size_t size)
{
    void *p = calloc(count ? count : 1, size);
    if (!p)
        fail("out of memory");
    return p;
}

/* ---- reading and writing: one JSON line, then little-endian float64 payloads ---- */

/* One line of stdin without its newline, or NULL at the end of input. */
static char *read_line(void)
{
    static char *buf;
    static size_t cap;
    size_t n = 0;
    int c;
    for (;;) {
        c = getchar();
        if (c == EOF && n == 0)
            return NULL;
        if (n + 1 >= cap) {
            cap = cap ? 2 * cap : 1024;
            buf = realloc(buf, cap);
            if (!buf)
                fail("out of memory");
        }
        if (c == EOF || c == '\n')
            break;
        buf[n++] = (char)c;
    }
    buf[n] = '\0';
    return buf;
}

/* Byte by byte, so that the host's byte order does not matter. */
static uint64_t get_u64(const unsigned char *b, int len)
{
    uint64_t u = 0;
    for (int i = len - 1; i >= 0; i--)
        u = u << 8 | b[i];
    return u;
}

static double to_double(uint64_t u)
{
    double d;
    memcpy(&d, &u, sizeof d);
    return d;
}

static void read_bytes(unsigned char *b, size_t n)
{
    if (fread(b, 1, n, stdin) != n)
        fail("short payload");
}

static void read_doubles(double *out, long n)
{
    unsigned char b[8];
    for (long i = 0; i < n; i++) {
        read_bytes(b, 8);
        out[i] = to_double(get_u64(b, 8));
    }
}

static void write_doubles(const double *v, long n)
{
    for (long i = 0; i < n; i++) {
        uint64_t u;
        unsigned char b[8];
        memcpy(&u, &v[i], sizeof u);
        for (int k = 0; k < 8; k++)
            b[k] = (unsigned char)(u >> (8 * k));
        fwrite(b, 1, 8, stdout);
    }
}

/* ---- a minimal JSON reader: just the few fields plumb's requests carry ---- */

static void skip_space(const char **p)
{
    while (**p == ' ' || **p == '\t' || **p == '\r')
        (*p)++;
}

/* Where the value of key `key` starts at or after s, or NULL. A key is a quoted string followed
 * by a colon; a string value equal to the key is followed by a comma or brace instead. */
static const char *value_of(const char *s, const char *key)
{
    size_t len = strlen(key);
    for (const char *p = strchr(s, '"'); p; p = strchr(p + 1, '"')) {
        if (strncmp(p + 1, key, len) == 0 && p[len + 1] == '"') {
            const char *q = p + len + 2;
            skip_space(&q);
            if (*q == ':') {
                q++;
                skip_space(&q);
                return q;
            }
        }
    }
    return NULL;
}

/* A string value (no escapes needed for plumb's names) into out; 0 if there is none. */
static int string_value(const char *p, char *out, size_t size)
{
    if (!p || *p != '"')
        return 0;
    size_t n = 0;
    for (p++; *p && *p != '"'; p++)
        if (n + 1 < size)
            out[n++] = *p;
    out[n] = '\0';
    return *p == '"';
}

static long int_value(const char *p)
{
    char *end;
    long v = p ? strtol(p, &end, 10) : -1;
    return (p && end != p) ? v : -1;
}

/* An array of integers such as [8, 5] into dim; the number of entries, or -1. */
static int shape_value(const char *p, long dim[], int max)
{
    int n = 0;
    if (!p || *p != '[')
        return -1;
    for (p++;;) {
        skip_space(&p);
        if (*p == ']')
            return n;
        char *end;
        long v = strtol(p, &end, 10);
        if (end == p || n == max || v < 0)
            return -1;
        dim[n++] = v;
        p = end;
        skip_space(&p);
        if (*p == ',')
            p++;
        else if (*p != ']')
            return -1;
    }
}

/* ---- the network ---- */

/* Forward pass over the batch with parameters th: fills act[] and logit, returns the loss
 * J = mean cross-entropy + (l2 / 2m) * sum of squared non-bias weights. */
static double forward(double *const th[])
{
    for (int j = 0; j < LAYERS; j++) {
        int in = SIZE[j], out = SIZE[j + 1];
        for (long i = 0; i < m; i++) {
            const double *a = act[j] + i * in;
            for (int r = 0; r < out; r++) {
                const double *w = th[j] + r * (in + 1);
                double s = w[0]; /* column 0 multiplies the bias unit */
                for (int c = 0; c < in; c++)
                    s += w[c + 1] * a[c];
                if (j < LAYERS - 1)
                    act[j + 1][i * out + r] = tanh(s);
                else
                    logit[i * out + r] = s;
            }
        }
    }
    /* Softmax and cross-entropy through a shifted log-sum-exp, so that nothing overflows. */
    int n = SIZE[LAYERS];
    double data = 0;
    for (long i = 0; i < m; i++) {
        const double *z = logit + i * n;
        double top = z[0], sum = 0;
        for (int k = 1; k < n; k++)
            top = z[k] > top ? z[k] : top;
        for (int k = 0; k < n; k++)
            sum += exp(z[k] - top);
        double lse = top + log(sum);
        for (int k = 0; k < n; k++) {
            act[LAYERS][i * n + k] = exp(z[k] - lse);
            data += ys[i * n + k] * (lse - z[k]);
        }
    }
    double squares = 0;
    for (int j = 0; j < LAYERS; j++)
        for (int r = 0; r < rows(j); r++)
            for (int c = 1; c < cols(j); c++)
                squares += th[j][r * cols(j) + c] * th[j][r * cols(j) + c];
    return data / m + L2 / (2.0 * m) * squares;
}

/* Whether a whole-network mistake applies to layer j (0-based). */
static int wrong_here(enum plant code, int j)
{
    return planted == code && (plant_at == 0 || plant_at == j + 1);
}

/* Backpropagation into grad[], with the planted mistake; returns the loss. */
static double backprop(void)
{
    double loss = forward(theta);
    int n = SIZE[LAYERS];
    /* Error at the output logits: softmax with cross-entropy gives (p * sum(y) - y) / m. */
    for (long i = 0; i < m; i++) {
        double ysum = 0;
        for (int k = 0; k < n; k++)
            ysum += ys[i * n + k];
        for (int k = 0; k < n; k++)
            delta[i * n + k] = (act[LAYERS][i * n + k] * ysum - ys[i * n + k]) / m;
    }
    for (int j = LAYERS - 1; j >= 0; j--) {
        int in = SIZE[j], out = SIZE[j + 1], w = in + 1;
        double *g = grad[j];
        /* Data term: the errors times the layer's inputs (1 for the bias column), summed. */
        memset(g, 0, sizeof(double) * out * w);
        for (long i = 0; i < m; i++)
            for (int r = 0; r < out; r++) {
                double d = delta[i * out + r];
                g[r * w] += d;
                for (int c = 0; c < in; c++)
                    g[r * w + c + 1] += d * act[j][i * in + c];
            }
        if (wrong_here(MISSING_BATCH_MEAN, j)) /* summed, not averaged: the data term times m */
            for (int e = 0; e < out * w; e++)
                g[e] *= m;
        /* Regularisation term (l2 / m) * w, bias column excluded. */
        for (int r = 0; r < out; r++)
            for (int c = 1; c < w; c++)
                g[r * w + c] += L2 / m * theta[j][r * w + c];
        if (wrong_here(SIGN_FLIPPED, j))
            for (int e = 0; e < out * w; e++)
                g[e] = -g[e];
        if (wrong_here(BIAS_GRADIENT_MISSING, j))
            for (int r = 0; r < out; r++)
                g[r * w] = 0;
        if (j == 0)
            break;
        /* The error of hidden layer k = j (1-based): back through the non-bias weights, times
         * tanh'(z) = 1 - a^2 -- unless that factor is the planted mistake. */
        int keep_slope = !(planted == ACTIVATION_DERIVATIVE_MISSING && plant_at == j);
        for (long i = 0; i < m; i++)
            for (int c = 0; c < in; c++) {
                double s = 0;
                for (int r = 0; r < out; r++)
                    s += delta[i * out + r] * theta[j][r * w + c + 1];
                double a = act[j][i * in + c];
                delta_next[i * in + c] = keep_slope ? s * (1 - a * a) : s;
            }
        double *t = delta;
        delta = delta_next;
        delta_next = t;
    }
    return loss;
}

/* ---- the requests ---- */

static void reply_tensors(void)
{
    for (int j = 0; j < LAYERS; j++)
        printf("%s{\"name\":\"layer%d\",\"shape\":[%d,%d]}", j ? "," : "", j + 1, rows(j), cols(j));
}

static void load(const char *line)
{
    const char *p = value_of(line, "tensors");
    if (!p || *p != '[')
        fail("load without tensors");
    p++;
    for (int j = 0; j < LAYERS; j++) {
        /* Each tensor is a flat object {"name": ..., "shape": [...]}; look inside it only. */
        char obj[512], name[64], want[16];
        long dim[4];
        while (*p == ' ' || *p == ',')
            p++;
        const char *end = strchr(p, '}');
        if (*p != '{' || !end || (size_t)(end - p) >= sizeof obj)
            fail("load: expected 3 tensors, layer1 to layer3");
        memcpy(obj, p, (size_t)(end - p));
        obj[end - p] = '\0';
        p = end + 1;
        sprintf(want, "layer%d", j + 1);
        if (!string_value(value_of(obj, "name"), name, sizeof name) || strcmp(name, want) != 0)
            fail("load: expected the tensors layer1, layer2, layer3 in that order");
        if (shape_value(value_of(obj, "shape"), dim, 4) != 2 || dim[0] != rows(j) || dim[1] != cols(j))
            fail("load: a tensor's shape is not the one of the hello");
    }
    skip_space(&p);
    if (*p != ']')
        fail("load: more tensors than layer1 to layer3");
    long xd[4], yd[4];
    const char *xo = value_of(line, "x"), *yo = value_of(line, "y");
    if (!xo || !yo || shape_value(value_of(xo, "shape"), xd, 4) != 2 ||
        shape_value(value_of(yo, "shape"), yd, 4) != 2)
        fail("load: x and y need a shape [m, columns]");
    if (xd[1] != SIZE[0] || yd[1] != SIZE[LAYERS] || xd[0] != yd[0] || xd[0] < 1)
        fail("load: x must be m x 4 and y m x 3");
    m = xd[0];
    for (int j = 0; j < LAYERS; j++) {
        free(theta[j]);
        free(work[j]);
        free(grad[j]);
        theta[j] = alloc((size_t)(rows(j) * cols(j)), sizeof(double));
        work[j] = alloc((size_t)(rows(j) * cols(j)), sizeof(double));
        grad[j] = alloc((size_t)(rows(j) * cols(j)), sizeof(double));
        read_doubles(theta[j], rows(j) * cols(j));
    }
    /* The work space: the widest layer bounds every per-sample row. */
    int widest = 0;
    for (int j = 0; j <= LAYERS; j++)
        widest = SIZE[j] > widest ? SIZE[j] : widest;
    for (int j = 1; j <= LAYERS; j++) {
        free(act[j]);
        act[j] = alloc((size_t)(m * SIZE[j]), sizeof(double));
    }
    free(xs);
    free(ys);
    free(logit);
    free(delta);
    free(delta_next);
    act[0] = xs = alloc((size_t)(m * SIZE[0]), sizeof(double));
    ys = alloc((size_t)(m * SIZE[LAYERS]), sizeof(double));
    logit = alloc((size_t)(m * SIZE[LAYERS]), sizeof(double));
    delta = alloc((size_t)(m * widest), sizeof(double));
    delta_next = alloc((size_t)(m * widest), sizeof(double));
    read_doubles(xs, m * SIZE[0]);
    read_doubles(ys, m * SIZE[LAYERS]);
}

/* The loss at each perturbation: the loaded parameters plus that perturbation's own changes. */
static void losses(const char *line)
{
    long count = int_value(value_of(line, "perturbations"));
    long changes = int_value(value_of(line, "changes"));
    if (count < 0 || changes < 0)
        fail("losses needs perturbations and changes");
    /* Records of 24 bytes: perturbation u32, tensor u32, index u64, delta f64. */
    long *which = alloc((size_t)changes, sizeof(long));
    long *tensor = alloc((size_t)changes, sizeof(long));
    long *index = alloc((size_t)changes, sizeof(long));
    double *step = alloc((size_t)changes, sizeof(double));
    for (long c = 0; c < changes; c++) {
        unsigned char b[24];
        read_bytes(b, 24);
        uint64_t k = get_u64(b, 4), t = get_u64(b + 4, 4), i = get_u64(b + 8, 8);
        if (k >= (uint64_t)count || t >= LAYERS || i >= (uint64_t)(rows((int)t) * cols((int)t)))
            fail("losses: a change outside the perturbations or the tensors");
        which[c] = (long)k;
        tensor[c] = (long)t;
        index[c] = (long)i;
        step[c] = to_double(get_u64(b + 16, 8));
    }
    /* Group the changes by perturbation (a counting sort), so each is applied once. */
    long *start = alloc((size_t)count + 1, sizeof(long));
    long *order = alloc((size_t)changes, sizeof(long));
    for (long c = 0; c < changes; c++)
        start[which[c] + 1]++;
    for (long k = 0; k < count; k++)
        start[k + 1] += start[k];
    long *fill = alloc((size_t)count, sizeof(long));
    for (long c = 0; c < changes; c++)
        order[start[which[c]] + fill[which[c]]++] = c;
    free(fill);
    double *out = alloc((size_t)count, sizeof(double));
    for (long k = 0; k < count; k++) {
        for (int j = 0; j < LAYERS; j++)
            memcpy(work[j], theta[j], sizeof(double) * rows(j) * cols(j));
        for (long e = start[k]; e < start[k + 1]; e++) {
            long c = order[e];
            work[tensor[c]][index[c]] += step[c];
        }
        out[k] = forward(work);
    }
    printf("{\"type\":\"losses\",\"count\":%ld}\n", count);
    write_doubles(out, count);
    fflush(stdout);
    free(which);
    free(tensor);
    free(index);
    free(step);
    free(start);
    free(order);
    free(out);
}

static void usage(void)
{
    fprintf(stderr, "usage: pump [--plant CODE[:N]]\n"
                    "  CODE: sign-flipped, missing-batch-mean, bias-gradient-missing (N = layer 1..3),\n"
                    "        activation-derivative-missing (N = hidden layer 1 or 2, default 1)\n");
    exit(2);
}

static void parse_plant(const char *arg)
{
    static const struct { const char *code; enum plant plant; } CODES[] = {
        {"sign-flipped", SIGN_FLIPPED},
        {"missing-batch-mean", MISSING_BATCH_MEAN},
        {"bias-gradient-missing", BIAS_GRADIENT_MISSING},
        {"activation-derivative-missing", ACTIVATION_DERIVATIVE_MISSING},
    };
    const char *colon = strchr(arg, ':');
    size_t len = colon ? (size_t)(colon - arg) : strlen(arg);
    for (size_t i = 0; i < sizeof CODES / sizeof CODES[0]; i++)
        if (strlen(CODES[i].code) == len && strncmp(arg, CODES[i].code, len) == 0)
            planted = CODES[i].plant;
    if (planted == NONE)
        usage();
    plant_at = colon ? atoi(colon + 1) : 0;
    if (planted == ACTIVATION_DERIVATIVE_MISSING) {
        plant_at = colon ? plant_at : 1;
        if (plant_at < 1 || plant_at > LAYERS - 1)
            usage();
    } else if (colon && (plant_at < 1 || plant_at > LAYERS)) {
        usage();
    }
}

int main(int argc, char **argv)
{
    for (int i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--plant") == 0 && i + 1 < argc)
            parse_plant(argv[++i]);
        else
            usage();
    }
    int loaded = 0;
    char *line;
    while ((line = read_line()) != NULL) {
        char type[32];
        if (!string_value(value_of(line, "type"), type, sizeof type))
            fail("a request that is not a JSON object with a type");
        if (strcmp(type, "hello") == 0) {
            printf("{\"type\":\"hello\",\"protocol\":1,\"name\":\"%s\",\"dtype\":\"f64\",\"tensors\":[", NAME);
            reply_tensors();
            /* One sample's shapes: what a black box without a description needs. */
            printf("],\"x\":{\"shape\":[%d]},\"y\":{\"shape\":[%d]}}\n", SIZE[0], SIZE[LAYERS]);
        } else if (strcmp(type, "load") == 0) {
            load(line);
            loaded = 1;
            printf("{\"type\":\"ready\"}\n");
        } else if (strcmp(type, "bye") == 0) {
            return 0;
        } else if (!loaded) {
            fail("a request before load");
        } else if (strcmp(type, "loss") == 0) {
            printf("{\"type\":\"loss\",\"loss\":%.17g}\n", forward(theta));
        } else if (strcmp(type, "gradient") == 0) {
            double loss = backprop();
            printf("{\"type\":\"gradient\",\"loss\":%.17g,\"tensors\":[", loss);
            reply_tensors();
            printf("]}\n");
            for (int j = 0; j < LAYERS; j++)
                write_doubles(grad[j], rows(j) * cols(j));
        } else if (strcmp(type, "losses") == 0) {
            losses(line);
        } else {
            fail("an unknown request type");
        }
        fflush(stdout);
    }
    return 0; /* plumb closed our stdin */
}
