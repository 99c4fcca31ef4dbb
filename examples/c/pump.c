/*
 * pump.c - a hand-written backpropagation of the INVENTED centrifugal-pump state classifier
 * (normal, cavitating, bearing wear from four invented sensor readings), in C99, for `plumb probe`.
 *
 * The network is examples/pump.toml: 4 inputs -> 8 tanh -> 6 tanh -> 3 softmax, cross-entropy,
 * l2 = 0.01, augmented layout (layerJ is units x (inputs + 1), column 0 multiplies the bias unit).
 * It speaks plumb's wire protocol version 1 (docs/protocol.md) on stdin/stdout through the
 * single header clients/c/plumb_wire.h, in float64 only: this file is the network and its
 * callbacks. Messages for people go to stderr: stdout belongs to the protocol.
 *
 *   pump [--plant CODE[:N]]
 *
 * CODE is one of docs/mistakes.md's codes:
 *   sign-flipped, missing-batch-mean, bias-gradient-missing   N = the only layer made wrong (1..3);
 *                                                              without it, every layer
 *   activation-derivative-missing                              N = the hidden layer k (1 or 2,
 *                                                              default 1); layers 1..k change
 *
 * Build: make (cc -O2 -std=c99 -Wall -Wextra -I../../clients/c -o pump pump.c -lm). No libraries
 * beyond libm.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "plumb_wire.h"

#define LAYERS 3
static const int SIZE[LAYERS + 1] = {4, 8, 6, 3};
static const double L2 = 0.01;
static const char *NAME = "pump-c";

enum plant { NONE, SIGN_FLIPPED, MISSING_BATCH_MEAN, BIAS_GRADIENT_MISSING, ACTIVATION_DERIVATIVE_MISSING };
static enum plant planted = NONE;
static int plant_at = 0; /* the layer (whole-network codes, 0 = all) or the hidden layer k */

/* The batch in use and the work space of a forward/backward pass, sized for m samples. */
static const double *xs, *ys;
static long m, room;
static double *act[LAYERS + 1]; /* act[j]: what layer j + 1 reads (act[0] = x); act[LAYERS] = p */
static double *logit;           /* the output layer's pre-activations */
static double *delta, *delta_next;

static int rows(int j) { return SIZE[j + 1]; }
static int cols(int j) { return SIZE[j] + 1; }

/* Takes the batch, growing the work space when it holds more samples than before; NULL or what
 * went wrong. */
static const char *use_batch(const plumb_batch *b)
{
    if (b->x_rank != 2 || b->y_rank != 2 || b->x_shape[1] != SIZE[0] || b->y_shape[1] != SIZE[LAYERS])
        return "x must be m x 4 and y m x 3";
    xs = b->x;
    ys = b->y;
    m = b->m;
    if (m > room) {
        int widest = 0;
        for (int j = 0; j <= LAYERS; j++)
            widest = SIZE[j] > widest ? SIZE[j] : widest;
        for (int j = 1; j <= LAYERS; j++) {
            free(act[j]);
            act[j] = malloc(sizeof(double) * (size_t)(m * SIZE[j]));
        }
        free(logit);
        free(delta);
        free(delta_next);
        logit = malloc(sizeof(double) * (size_t)(m * SIZE[LAYERS]));
        delta = malloc(sizeof(double) * (size_t)(m * widest));
        delta_next = malloc(sizeof(double) * (size_t)(m * widest));
        for (int j = 1; j <= LAYERS; j++)
            if (!act[j])
                return "out of memory";
        if (!logit || !delta || !delta_next)
            return "out of memory";
        room = m;
    }
    act[0] = (double *)xs;
    return NULL;
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
static double backprop(double *const theta[], double *const grad[])
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

/* ---- the callbacks plumb_wire.h calls ---- */

static const char *loss_at(void *user, double *const *params, const plumb_batch *b, double *out)
{
    (void)user;
    const char *why = use_batch(b);
    if (!why)
        *out = forward(params);
    return why;
}

static const char *gradient_at(void *user, double *const *params, const plumb_batch *b,
                               double *out, double *const *grads)
{
    (void)user;
    const char *why = use_batch(b);
    if (!why)
        *out = backprop(params, grads);
    return why;
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
    plumb_tensor tensors[LAYERS];
    for (int j = 0; j < LAYERS; j++) {
        static char names[LAYERS][24];
        snprintf(names[j], sizeof names[j], "layer%d", j + 1);
        tensors[j].name = names[j];
        tensors[j].rank = 2;
        tensors[j].shape[0] = rows(j);
        tensors[j].shape[1] = cols(j);
    }
    plumb_server server;
    plumb_server_init(&server, NAME, LAYERS, tensors, loss_at, gradient_at, NULL);
    /* One sample's shapes: what a black box without a description needs. */
    server.x_rank = server.y_rank = 1;
    server.x_shape[0] = SIZE[0];
    server.y_shape[0] = SIZE[LAYERS];
    return plumb_serve(&server);
}
