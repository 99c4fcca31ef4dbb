/*
 * plumb_wire.h - the program side of plumb's wire protocol, version 1 (docs/protocol.md), in one
 * header: hand `plumb probe` a loss and its gradient computed by your own C, C++ or CUDA host code.
 *
 * C99 or C++98 and later; nothing beyond the C standard library. Every function is `static inline`,
 * so include the header in as many translation units as you like. Usage:
 *
 *     #include "plumb_wire.h"
 *
 *     static const char *loss(void *user, double *const *params, const plumb_batch *b, double *out);
 *     static const char *gradient(void *user, double *const *params, const plumb_batch *b,
 *                                 double *out, double *const *grads);
 *
 *     int main(void) {
 *         plumb_tensor tensors[2] = {{"layer1", 2, {8, 5}}, {"layer2", 2, {3, 9}}};
 *         plumb_server s;
 *         plumb_server_init(&s, "my-net", 2, tensors, loss, gradient, NULL);
 *         return plumb_serve(&s);
 *     }
 *
 * The callbacks get the parameters as one float64 array per tensor (C order, in the order of
 * `tensors`) and the batch (x and y in C order, their shapes with the sample count m first). They
 * write the loss to *out (and the gradient, one array per tensor of the tensor's size, to grads),
 * and return NULL, or a message saying what went wrong: it is sent to plumb as an error reply.
 * Optionally set s.input_gradient to a callback writing the gradient with respect to x (x's size)
 * at the same parameters: the hello then says so and every gradient reply carries it as the
 * tensor "input", which plumb checks against the reference's input gradient.
 * The loss callback must not keep or change the parameters it is given: plumb_serve perturbs them
 * and puts them back between calls. Code that computes on a GPU copies the arrays to the device
 * inside the callbacks; this header only runs on the host.
 *
 * stdout belongs to the protocol: print for people on stderr. plumb_serve returns 0 after plumb's
 * "bye" (or when plumb closes stdin) and 1 after an error reply; return it from main.
 * Numbers are read and written in the "C" locale's form: do not change LC_NUMERIC.
 */
#ifndef PLUMB_WIRE_H
#define PLUMB_WIRE_H

#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define PLUMB_WIRE_PROTOCOL 1
/* The most axes a tensor, x or y may have. */
#define PLUMB_WIRE_MAX_RANK 8
/* The longest request line accepted (a load lists every tensor's name and shape). */
#define PLUMB_WIRE_MAX_LINE (16L << 20)

/* A parameter tensor: its name and shape. */
typedef struct plumb_tensor {
    const char *name;
    int rank;
    long shape[PLUMB_WIRE_MAX_RANK];
} plumb_tensor;

/* The batch plumb loaded: x is (m, *one sample's input), y is (m, *one sample's target). */
typedef struct plumb_batch {
    const double *x, *y;
    long m;
    int x_rank, y_rank;
    long x_shape[PLUMB_WIRE_MAX_RANK], y_shape[PLUMB_WIRE_MAX_RANK];
} plumb_batch;

/* The loss at params on the batch, into *out. NULL on success, else what went wrong. */
typedef const char *(*plumb_loss_fn)(void *user, double *const *params, const plumb_batch *batch,
                                     double *out);
/* The loss into *out and the gradient of every tensor into grads[j] (the tensor's size). */
typedef const char *(*plumb_gradient_fn)(void *user, double *const *params,
                                         const plumb_batch *batch, double *out,
                                         double *const *grads);

/* The gradient of the loss with respect to x into dx (x's size, C order), at params. */
typedef const char *(*plumb_input_gradient_fn)(void *user, double *const *params,
                                               const plumb_batch *batch, double *dx);

/* What the program declares and how it answers. Fill it with plumb_server_init, then set the
 * optional fields. */
typedef struct plumb_server {
    const char *name;  /* shown in plumb's report */
    const char *dtype; /* "f64" (the default) or "f32": the type the callbacks compute in */
    int tensor_count;
    const plumb_tensor *tensors;
    plumb_loss_fn loss;
    plumb_gradient_fn gradient;
    void *user; /* handed to the callbacks */
    /* Optional: one sample's input and target shapes (rank 0: not declared). Declared in the hello,
     * they let `plumb probe --blackbox` draw or split data without a description. */
    int x_rank, y_rank;
    long x_shape[PLUMB_WIRE_MAX_RANK], y_shape[PLUMB_WIRE_MAX_RANK];
    /* Optional (NULL: not sent): the input gradient, sent after every gradient as "input". */
    plumb_input_gradient_fn input_gradient;
    FILE *in, *out; /* NULL: stdin and stdout */
} plumb_server;

static inline void plumb_server_init(plumb_server *s, const char *name, int tensor_count,
                                     const plumb_tensor *tensors, plumb_loss_fn loss,
                                     plumb_gradient_fn gradient, void *user)
{
    memset(s, 0, sizeof *s);
    s->name = name;
    s->dtype = "f64";
    s->tensor_count = tensor_count;
    s->tensors = tensors;
    s->loss = loss;
    s->gradient = gradient;
    s->user = user;
}

/* ---- a small JSON reader: a tree of nodes over one request line, strings decoded in place ---- */

enum { PLUMB_JSON_NULL, PLUMB_JSON_BOOL, PLUMB_JSON_NUMBER, PLUMB_JSON_STRING, PLUMB_JSON_ARRAY,
       PLUMB_JSON_OBJECT };

/* An object's children alternate key (a string) and value. */
typedef struct plumb_json_node {
    int kind;
    int first, next; /* first child, next sibling; -1 for none */
    double number;
    const char *string;
} plumb_json_node;

typedef struct plumb_json {
    plumb_json_node *nodes;
    int count, cap;
    char *p; /* the reading position */
    int depth;
} plumb_json;

static inline void plumb_json_space(plumb_json *j)
{
    while (*j->p == ' ' || *j->p == '\t' || *j->p == '\r' || *j->p == '\n')
        j->p++;
}

static inline int plumb_json_node_new(plumb_json *j, int kind)
{
    if (j->count == j->cap) {
        int cap = j->cap ? 2 * j->cap : 64;
        plumb_json_node *n =
            (plumb_json_node *)realloc(j->nodes, (size_t)cap * sizeof(plumb_json_node));
        if (!n)
            return -1;
        j->nodes = n;
        j->cap = cap;
    }
    plumb_json_node *n = &j->nodes[j->count];
    n->kind = kind;
    n->first = n->next = -1;
    n->number = 0;
    n->string = NULL;
    return j->count++;
}

/* UTF-8 of a code point into w; the bytes written. */
static inline int plumb_json_utf8(char *w, unsigned long c)
{
    if (c < 0x80) {
        w[0] = (char)c;
        return 1;
    }
    if (c < 0x800) {
        w[0] = (char)(0xC0 | (c >> 6));
        w[1] = (char)(0x80 | (c & 0x3F));
        return 2;
    }
    if (c < 0x10000) {
        w[0] = (char)(0xE0 | (c >> 12));
        w[1] = (char)(0x80 | ((c >> 6) & 0x3F));
        w[2] = (char)(0x80 | (c & 0x3F));
        return 3;
    }
    w[0] = (char)(0xF0 | (c >> 18));
    w[1] = (char)(0x80 | ((c >> 12) & 0x3F));
    w[2] = (char)(0x80 | ((c >> 6) & 0x3F));
    w[3] = (char)(0x80 | (c & 0x3F));
    return 4;
}

static inline long plumb_json_hex4(const char *p)
{
    long v = 0;
    for (int k = 0; k < 4; k++) {
        char c = p[k];
        int d = c >= '0' && c <= '9' ? c - '0'
                : c >= 'a' && c <= 'f' ? c - 'a' + 10
                : c >= 'A' && c <= 'F' ? c - 'A' + 10
                                       : -1;
        if (d < 0)
            return -1;
        v = v * 16 + d;
    }
    return v;
}

/* A string at j->p (after its opening quote), decoded in place. */
static inline const char *plumb_json_string(plumb_json *j)
{
    char *r = j->p, *w = j->p, *start = j->p;
    for (;;) {
        char c = *r++;
        if (c == '"')
            break;
        if (c == '\0' || (unsigned char)c < 0x20)
            return NULL;
        if (c != '\\') {
            *w++ = c;
            continue;
        }
        c = *r++;
        switch (c) {
        case '"': *w++ = '"'; break;
        case '\\': *w++ = '\\'; break;
        case '/': *w++ = '/'; break;
        case 'b': *w++ = '\b'; break;
        case 'f': *w++ = '\f'; break;
        case 'n': *w++ = '\n'; break;
        case 'r': *w++ = '\r'; break;
        case 't': *w++ = '\t'; break;
        case 'u': {
            long u = plumb_json_hex4(r);
            if (u < 0)
                return NULL;
            r += 4;
            if (u >= 0xD800 && u < 0xDC00 && r[0] == '\\' && r[1] == 'u') {
                long low = plumb_json_hex4(r + 2);
                if (low >= 0xDC00 && low < 0xE000) {
                    u = 0x10000 + ((u - 0xD800) << 10) + (low - 0xDC00);
                    r += 6;
                }
            }
            /* Never longer than its escape (6 or 12 bytes), so decoding in place is safe. */
            w += plumb_json_utf8(w, (unsigned long)u);
            break;
        }
        default:
            return NULL;
        }
    }
    j->p = r;
    *w = '\0';
    return start;
}

static inline int plumb_json_value(plumb_json *j);

/* The elements of an array or the members of an object, after its opening bracket. */
static inline int plumb_json_children(plumb_json *j, int parent, char close)
{
    int last = -1;
    plumb_json_space(j);
    if (*j->p == close) {
        j->p++;
        return parent;
    }
    for (;;) {
        int first = -1;
        if (close == '}') { /* a key, then a colon */
            plumb_json_space(j);
            if (*j->p != '"')
                return -1;
            j->p++;
            first = plumb_json_node_new(j, PLUMB_JSON_STRING);
            if (first < 0)
                return -1;
            const char *key = plumb_json_string(j);
            if (!key)
                return -1;
            j->nodes[first].string = key;
            plumb_json_space(j);
            if (*j->p++ != ':')
                return -1;
        }
        int value = plumb_json_value(j);
        if (value < 0)
            return -1;
        if (first < 0)
            first = value;
        else
            j->nodes[first].next = value;
        if (last < 0)
            j->nodes[parent].first = first;
        else
            j->nodes[last].next = first;
        last = value;
        plumb_json_space(j);
        if (*j->p == ',') {
            j->p++;
            continue;
        }
        if (*j->p++ != close)
            return -1;
        return parent;
    }
}

static inline int plumb_json_value(plumb_json *j)
{
    plumb_json_space(j);
    char c = *j->p;
    if (c == '{' || c == '[') {
        if (++j->depth > 64)
            return -1;
        j->p++;
        int n = plumb_json_node_new(j, c == '{' ? PLUMB_JSON_OBJECT : PLUMB_JSON_ARRAY);
        if (n < 0 || plumb_json_children(j, n, c == '{' ? '}' : ']') < 0)
            return -1;
        j->depth--;
        return n;
    }
    if (c == '"') {
        j->p++;
        int n = plumb_json_node_new(j, PLUMB_JSON_STRING);
        if (n < 0 || !(j->nodes[n].string = plumb_json_string(j)))
            return -1;
        return n;
    }
    static const char *const words[3] = {"true", "false", "null"};
    for (int k = 0; k < 3; k++) {
        size_t len = strlen(words[k]);
        if (strncmp(j->p, words[k], len) == 0) {
            j->p += len;
            int n = plumb_json_node_new(j, k == 2 ? PLUMB_JSON_NULL : PLUMB_JSON_BOOL);
            if (n >= 0)
                j->nodes[n].number = k == 0;
            return n;
        }
    }
    if (c == '-' || (c >= '0' && c <= '9')) {
        char *end;
        double v = strtod(j->p, &end);
        if (end == j->p)
            return -1;
        j->p = end;
        int n = plumb_json_node_new(j, PLUMB_JSON_NUMBER);
        if (n >= 0)
            j->nodes[n].number = v;
        return n;
    }
    return -1;
}

/* Parses a whole line into j (nodes[0] is the root); 0 on success. */
static inline int plumb_json_parse(plumb_json *j, char *line)
{
    j->count = 0;
    j->depth = 0;
    j->p = line;
    if (plumb_json_value(j) != 0)
        return -1;
    plumb_json_space(j);
    return *j->p == '\0' ? 0 : -1;
}

/* The value of member `key` of object node `obj`, or -1. */
static inline int plumb_json_get(const plumb_json *j, int obj, const char *key)
{
    if (obj < 0 || j->nodes[obj].kind != PLUMB_JSON_OBJECT)
        return -1;
    for (int k = j->nodes[obj].first; k >= 0; k = j->nodes[j->nodes[k].next].next)
        if (strcmp(j->nodes[k].string, key) == 0)
            return j->nodes[k].next;
    return -1;
}

/* A whole, non-negative number below 2^53 (a count, an index, a size), or -1. */
static inline long plumb_json_count(const plumb_json *j, int n)
{
    if (n < 0 || j->nodes[n].kind != PLUMB_JSON_NUMBER)
        return -1;
    double v = j->nodes[n].number;
    return v >= 0 && v < 9007199254740992.0 && v == floor(v) ? (long)v : -1;
}

/* A shape [d0, d1, ...] into dim; its rank, or -1. */
static inline int plumb_json_shape(const plumb_json *j, int n, long dim[PLUMB_WIRE_MAX_RANK])
{
    if (n < 0 || j->nodes[n].kind != PLUMB_JSON_ARRAY)
        return -1;
    int rank = 0;
    for (int k = j->nodes[n].first; k >= 0; k = j->nodes[k].next) {
        long d = plumb_json_count(j, k);
        if (d < 0 || rank == PLUMB_WIRE_MAX_RANK)
            return -1;
        dim[rank++] = d;
    }
    return rank;
}

/* ---- the session ---- */

typedef struct plumb_session {
    const plumb_server *s;
    FILE *in, *out;
    plumb_json json;
    char *line;
    size_t line_cap;
    double **params, **work, **grads; /* loaded, perturbed and gradient arrays per tensor */
    double *x, *y, *dx; /* dx: the input gradient, x's size, when the server sends it */
    plumb_batch batch;
    char message[512];
} plumb_session;

/* The number of values of a shape, or -1 past 2^40 (far more than any request carries). */
static inline long plumb_wire_size(int rank, const long *dim)
{
    long n = 1;
    for (int k = 0; k < rank; k++) {
        if (dim[k] != 0 && n > (1L << 40) / dim[k])
            return -1;
        n *= dim[k];
    }
    return n;
}

/* One line of input without its newline into ss->line; 0 at the end of input, -1 past the
 * longest line accepted. */
static inline int plumb_wire_read_line(plumb_session *ss)
{
    size_t n = 0;
    int c;
    while ((c = getc(ss->in)) != EOF && c != '\n') {
        if (n + 1 >= ss->line_cap) {
            if (ss->line_cap >= (size_t)PLUMB_WIRE_MAX_LINE)
                return -1;
            size_t cap = ss->line_cap ? 2 * ss->line_cap : 4096;
            char *l = (char *)realloc(ss->line, cap);
            if (!l)
                return -1;
            ss->line = l;
            ss->line_cap = cap;
        }
        ss->line[n++] = (char)c;
    }
    if (c == EOF && n == 0)
        return 0;
    if (!ss->line) {
        ss->line = (char *)malloc(1);
        if (!ss->line)
            return -1;
        ss->line_cap = 1;
    }
    ss->line[n] = '\0';
    return 1;
}

/* Little-endian float64 values, byte by byte so that the host's byte order does not matter. */
static inline int plumb_wire_read_doubles(FILE *in, double *v, long n)
{
    unsigned char b[8];
    for (long i = 0; i < n; i++) {
        if (fread(b, 1, 8, in) != 8)
            return -1;
        unsigned long long u = 0;
        for (int k = 7; k >= 0; k--)
            u = u << 8 | b[k];
        memcpy(&v[i], &u, sizeof u);
    }
    return 0;
}

static inline void plumb_wire_write_doubles(FILE *out, const double *v, long n)
{
    for (long i = 0; i < n; i++) {
        unsigned long long u;
        unsigned char b[8];
        memcpy(&u, &v[i], sizeof u);
        for (int k = 0; k < 8; k++)
            b[k] = (unsigned char)(u >> (8 * k));
        fwrite(b, 1, 8, out);
    }
}

static inline void plumb_wire_write_string(FILE *out, const char *s)
{
    putc('"', out);
    for (; *s; s++) {
        unsigned char c = (unsigned char)*s;
        if (c == '"' || c == '\\')
            fprintf(out, "\\%c", c);
        else if (c < 0x20)
            fprintf(out, "\\u%04x", c);
        else
            putc(c, out);
    }
    putc('"', out);
}

static inline void plumb_wire_write_shape(FILE *out, int rank, const long *dim)
{
    putc('[', out);
    for (int k = 0; k < rank; k++)
        fprintf(out, "%s%ld", k ? "," : "", dim[k]);
    putc(']', out);
}

/* The "tensors" list of the hello or a gradient reply; with_input adds "input" of x's shape. */
static inline void plumb_wire_write_tensors(plumb_session *ss, int with_input)
{
    fputs("\"tensors\":[", ss->out);
    for (int t = 0; t < ss->s->tensor_count; t++) {
        fputs(t ? ",{\"name\":" : "{\"name\":", ss->out);
        plumb_wire_write_string(ss->out, ss->s->tensors[t].name);
        fputs(",\"shape\":", ss->out);
        plumb_wire_write_shape(ss->out, ss->s->tensors[t].rank, ss->s->tensors[t].shape);
        putc('}', ss->out);
    }
    if (with_input) {
        fputs(ss->s->tensor_count ? ",{\"name\":\"input\",\"shape\":" : "{\"name\":\"input\",\"shape\":",
              ss->out);
        plumb_wire_write_shape(ss->out, ss->batch.x_rank, ss->batch.x_shape);
        putc('}', ss->out);
    }
    putc(']', ss->out);
}

/* Sets the message of an error reply; returns -1 for the caller to return. */
static inline int plumb_wire_fail(plumb_session *ss, const char *what, const char *detail)
{
    snprintf(ss->message, sizeof ss->message, "%s: %s%s%s", ss->s->name, what,
             detail ? ": " : "", detail ? detail : "");
    return -1;
}

static inline long plumb_wire_tensor_size(const plumb_session *ss, int t)
{
    return plumb_wire_size(ss->s->tensors[t].rank, ss->s->tensors[t].shape);
}

static inline void plumb_wire_free_data(plumb_session *ss)
{
    for (int t = 0; ss->params && t < ss->s->tensor_count; t++) {
        free(ss->params[t]);
        free(ss->work[t]);
        free(ss->grads[t]);
    }
    free(ss->params);
    free(ss->work);
    free(ss->grads);
    free(ss->x);
    free(ss->y);
    free(ss->dx);
    ss->params = ss->work = ss->grads = NULL;
    ss->x = ss->y = ss->dx = NULL;
}

static inline int plumb_wire_hello(plumb_session *ss)
{
    const plumb_server *s = ss->s;
    fprintf(ss->out, "{\"type\":\"hello\",\"protocol\":%d,\"name\":", PLUMB_WIRE_PROTOCOL);
    plumb_wire_write_string(ss->out, s->name);
    fputs(",\"dtype\":", ss->out);
    plumb_wire_write_string(ss->out, s->dtype ? s->dtype : "f64");
    putc(',', ss->out);
    plumb_wire_write_tensors(ss, 0);
    if (s->x_rank > 0 && s->y_rank > 0) {
        fputs(",\"x\":{\"shape\":", ss->out);
        plumb_wire_write_shape(ss->out, s->x_rank, s->x_shape);
        fputs("},\"y\":{\"shape\":", ss->out);
        plumb_wire_write_shape(ss->out, s->y_rank, s->y_shape);
        putc('}', ss->out);
    }
    if (s->input_gradient)
        fputs(",\"input_gradient\":true", ss->out);
    fputs("}\n", ss->out);
    return 0;
}

/* x or y of a load: its shape into dim and rank, its values into a new array. */
static inline int plumb_wire_load_array(plumb_session *ss, const char *which, int *rank, long *dim,
                                        double **values)
{
    const plumb_json *j = &ss->json;
    *rank = plumb_json_shape(j, plumb_json_get(j, plumb_json_get(j, 0, which), "shape"), dim);
    long n = *rank >= 1 ? plumb_wire_size(*rank, dim) : -1;
    if (n < 0)
        return plumb_wire_fail(ss, "load", "x and y need a shape [m, ...] of at most 8 axes");
    *values = (double *)malloc((size_t)(n ? n : 1) * sizeof(double));
    if (!*values)
        return plumb_wire_fail(ss, "load", "out of memory for the data");
    if (plumb_wire_read_doubles(ss->in, *values, n))
        return plumb_wire_fail(ss, "load", "short payload");
    return 0;
}

static inline int plumb_wire_load(plumb_session *ss)
{
    const plumb_server *s = ss->s;
    const plumb_json *j = &ss->json;
    int count = s->tensor_count;
    plumb_wire_free_data(ss);
    ss->params = (double **)calloc((size_t)count + 1, sizeof(double *));
    ss->work = (double **)calloc((size_t)count + 1, sizeof(double *));
    ss->grads = (double **)calloc((size_t)count + 1, sizeof(double *));
    if (!ss->params || !ss->work || !ss->grads)
        return plumb_wire_fail(ss, "load", "out of memory");
    int list = plumb_json_get(j, 0, "tensors");
    if (list < 0 || j->nodes[list].kind != PLUMB_JSON_ARRAY)
        return plumb_wire_fail(ss, "load", "no tensors list");
    /* The payload comes in the order of the load's list; each entry must be one of ours. */
    for (int k = j->nodes[list].first; k >= 0; k = j->nodes[k].next) {
        int name = plumb_json_get(j, k, "name");
        long dim[PLUMB_WIRE_MAX_RANK];
        int rank = plumb_json_shape(j, plumb_json_get(j, k, "shape"), dim);
        if (name < 0 || j->nodes[name].kind != PLUMB_JSON_STRING || rank < 0)
            return plumb_wire_fail(ss, "load", "a tensor without a name and a shape");
        int t = 0;
        while (t < count && strcmp(s->tensors[t].name, j->nodes[name].string) != 0)
            t++;
        if (t == count)
            return plumb_wire_fail(ss, "load names a tensor this program does not have",
                                   j->nodes[name].string);
        if (ss->params[t])
            return plumb_wire_fail(ss, "load names a tensor twice", s->tensors[t].name);
        if (rank != s->tensors[t].rank ||
            memcmp(dim, s->tensors[t].shape, (size_t)rank * sizeof(long)) != 0)
            return plumb_wire_fail(ss, "load gives a tensor another shape than this program's",
                                   s->tensors[t].name);
        long n = plumb_wire_tensor_size(ss, t);
        size_t bytes = (size_t)(n ? n : 1) * sizeof(double);
        ss->params[t] = (double *)malloc(bytes);
        ss->work[t] = (double *)malloc(bytes);
        ss->grads[t] = (double *)malloc(bytes);
        if (n < 0 || !ss->params[t] || !ss->work[t] || !ss->grads[t])
            return plumb_wire_fail(ss, "load", "out of memory for the parameters");
        if (plumb_wire_read_doubles(ss->in, ss->params[t], n))
            return plumb_wire_fail(ss, "load", "short payload");
        memcpy(ss->work[t], ss->params[t], bytes);
    }
    for (int t = 0; t < count; t++)
        if (!ss->params[t])
            return plumb_wire_fail(ss, "load lacks a tensor", s->tensors[t].name);
    plumb_batch *b = &ss->batch;
    if (plumb_wire_load_array(ss, "x", &b->x_rank, b->x_shape, &ss->x) ||
        plumb_wire_load_array(ss, "y", &b->y_rank, b->y_shape, &ss->y))
        return -1;
    if (b->x_shape[0] != b->y_shape[0])
        return plumb_wire_fail(ss, "load", "x and y hold different numbers of samples");
    if (s->x_rank > 0 &&
        (b->x_rank != s->x_rank + 1 ||
         memcmp(b->x_shape + 1, s->x_shape, (size_t)s->x_rank * sizeof(long)) != 0 ||
         b->y_rank != s->y_rank + 1 ||
         memcmp(b->y_shape + 1, s->y_shape, (size_t)s->y_rank * sizeof(long)) != 0))
        return plumb_wire_fail(ss, "load", "x or y has another sample shape than the hello's");
    b->x = ss->x;
    b->y = ss->y;
    b->m = b->x_shape[0];
    if (s->input_gradient) {
        long n = plumb_wire_size(b->x_rank, b->x_shape);
        ss->dx = (double *)calloc((size_t)(n ? n : 1), sizeof(double));
        if (!ss->dx)
            return plumb_wire_fail(ss, "load", "out of memory for the input gradient");
    }
    fputs("{\"type\":\"ready\"}\n", ss->out);
    return 0;
}

static inline int plumb_wire_loss_reply(plumb_session *ss, const char *type, double loss)
{
    if (!isfinite(loss))
        return plumb_wire_fail(ss, "the loss is not finite", NULL);
    fprintf(ss->out, "{\"type\":\"%s\",\"loss\":%.17g", type, loss);
    return 0;
}

static inline int plumb_wire_losses(plumb_session *ss)
{
    const plumb_json *j = &ss->json;
    long count = plumb_json_count(j, plumb_json_get(j, 0, "perturbations"));
    long changes = plumb_json_count(j, plumb_json_get(j, 0, "changes"));
    if (count < 0 || changes < 0 || count > (1L << 32) || changes > (1L << 32))
        return plumb_wire_fail(ss, "losses", "needs the counts perturbations and changes");
    /* Records of 24 bytes: perturbation u32, tensor u32, flat index u64, delta f64. */
    size_t c_n = (size_t)changes, k_n = (size_t)count;
    long *which = (long *)malloc((c_n + 1) * sizeof(long));
    long *tensor = (long *)malloc((c_n + 1) * sizeof(long));
    long *index = (long *)malloc((c_n + 1) * sizeof(long));
    double *delta = (double *)malloc((c_n + 1) * sizeof(double));
    double *saved = (double *)malloc((c_n + 1) * sizeof(double));
    long *order = (long *)malloc((c_n + 1) * sizeof(long));
    long *start = (long *)calloc(k_n + 2, sizeof(long));
    double *out = (double *)malloc((k_n + 1) * sizeof(double));
    int status = 0;
    if (!which || !tensor || !index || !delta || !saved || !order || !start || !out)
        status = plumb_wire_fail(ss, "losses", "out of memory");
    for (size_t c = 0; status == 0 && c < c_n; c++) {
        unsigned char b[24];
        if (fread(b, 1, 24, ss->in) != 24) {
            status = plumb_wire_fail(ss, "losses", "short payload");
            break;
        }
        unsigned long long v[3] = {0, 0, 0};
        for (int k = 3; k >= 0; k--)
            v[0] = v[0] << 8 | b[k];
        for (int k = 7; k >= 4; k--)
            v[1] = v[1] << 8 | b[k];
        for (int k = 15; k >= 8; k--)
            v[2] = v[2] << 8 | b[k];
        if (v[0] >= (unsigned long long)count || v[1] >= (unsigned long long)ss->s->tensor_count ||
            v[2] >= (unsigned long long)plumb_wire_tensor_size(ss, (int)v[1])) {
            status = plumb_wire_fail(ss, "losses", "a change outside the perturbations or tensors");
            break;
        }
        unsigned long long u = 0;
        for (int k = 23; k >= 16; k--)
            u = u << 8 | b[k];
        which[c] = (long)v[0];
        tensor[c] = (long)v[1];
        index[c] = (long)v[2];
        memcpy(&delta[c], &u, sizeof u);
        start[which[c] + 1]++;
    }
    if (status == 0) {
        /* Group the changes by perturbation (a counting sort); each perturbation's changes are
         * applied to the work copy, the loss taken, and the saved values put back exactly. */
        for (size_t k = 0; k < k_n; k++)
            start[k + 1] += start[k];
        for (size_t c = 0; c < c_n; c++)
            order[start[which[c]]++] = (long)c;
        for (size_t k = k_n; k > 0; k--)
            start[k] = start[k - 1];
        start[0] = 0;
    }
    for (size_t k = 0; status == 0 && k < k_n; k++) {
        for (long e = start[k]; e < start[k + 1]; e++) {
            long c = order[e];
            saved[e] = ss->work[tensor[c]][index[c]];
            ss->work[tensor[c]][index[c]] += delta[c];
        }
        const char *why = ss->s->loss(ss->s->user, ss->work, &ss->batch, &out[k]);
        for (long e = start[k + 1] - 1; e >= start[k]; e--)
            ss->work[tensor[order[e]]][index[order[e]]] = saved[e];
        if (why)
            status = plumb_wire_fail(ss, "the loss failed", why);
        else if (!isfinite(out[k]))
            status = plumb_wire_fail(ss, "a perturbed loss is not finite", NULL);
    }
    if (status == 0) {
        fprintf(ss->out, "{\"type\":\"losses\",\"count\":%ld}\n", count);
        plumb_wire_write_doubles(ss->out, out, count);
    }
    free(which);
    free(tensor);
    free(index);
    free(delta);
    free(saved);
    free(order);
    free(start);
    free(out);
    return status;
}

/* One request; 1 after "bye", -1 after a failure (ss->message says which), else 0. */
static inline int plumb_wire_request(plumb_session *ss)
{
    const plumb_json *j = &ss->json;
    int type = plumb_json_get(j, 0, "type");
    if (type < 0 || j->nodes[type].kind != PLUMB_JSON_STRING)
        return plumb_wire_fail(ss, "a request that is not a JSON object with a type", NULL);
    const char *t = j->nodes[type].string;
    if (strcmp(t, "bye") == 0)
        return 1;
    if (strcmp(t, "hello") == 0)
        return plumb_wire_hello(ss);
    if (strcmp(t, "load") == 0)
        return plumb_wire_load(ss);
    if (strcmp(t, "loss") != 0 && strcmp(t, "gradient") != 0 && strcmp(t, "losses") != 0)
        return plumb_wire_fail(ss, "an unknown request type", t);
    if (!ss->params)
        return plumb_wire_fail(ss, "a request before load", t);
    if (strcmp(t, "losses") == 0)
        return plumb_wire_losses(ss);
    double loss = 0;
    const char *why;
    if (strcmp(t, "loss") == 0) {
        why = ss->s->loss(ss->s->user, ss->params, &ss->batch, &loss);
        if (why)
            return plumb_wire_fail(ss, "the loss failed", why);
        if (plumb_wire_loss_reply(ss, "loss", loss))
            return -1;
        fputs("}\n", ss->out);
        return 0;
    }
    why = ss->s->gradient(ss->s->user, ss->params, &ss->batch, &loss, ss->grads);
    if (why)
        return plumb_wire_fail(ss, "the gradient failed", why);
    if (plumb_wire_loss_reply(ss, "gradient", loss))
        return -1;
    if (ss->s->input_gradient) {
        why = ss->s->input_gradient(ss->s->user, ss->params, &ss->batch, ss->dx);
        if (why)
            return plumb_wire_fail(ss, "the input gradient failed", why);
    }
    putc(',', ss->out);
    plumb_wire_write_tensors(ss, ss->s->input_gradient != NULL);
    fputs("}\n", ss->out);
    for (int k = 0; k < ss->s->tensor_count; k++)
        plumb_wire_write_doubles(ss->out, ss->grads[k], plumb_wire_tensor_size(ss, k));
    if (ss->s->input_gradient)
        plumb_wire_write_doubles(ss->out, ss->dx,
                                 plumb_wire_size(ss->batch.x_rank, ss->batch.x_shape));
    return 0;
}

/* Answers plumb's requests until "bye" or the end of input (returns 0), or until a failure, which
 * is sent to plumb as an error reply and written to stderr (returns 1). */
static inline int plumb_serve(const plumb_server *s)
{
    plumb_session ss;
    memset(&ss, 0, sizeof ss);
    ss.s = s;
    ss.in = s->in ? s->in : stdin;
    ss.out = s->out ? s->out : stdout;
    int status = 0;
    for (;;) {
        int got = plumb_wire_read_line(&ss);
        if (got == 0)
            break; /* plumb closed our stdin */
        if (got < 0) {
            plumb_wire_fail(&ss, "a request line too long or out of memory", NULL);
            status = -1;
        } else if (plumb_json_parse(&ss.json, ss.line) != 0) {
            plumb_wire_fail(&ss, "a request that is not one line of JSON", NULL);
            status = -1;
        } else {
            status = plumb_wire_request(&ss);
        }
        if (status != 0)
            break;
        fflush(ss.out);
    }
    if (status < 0) {
        fputs("{\"type\":\"error\",\"message\":", ss.out);
        plumb_wire_write_string(ss.out, ss.message);
        fputs("}\n", ss.out);
        fflush(ss.out);
        fprintf(stderr, "%s\n", ss.message);
    }
    plumb_wire_free_data(&ss);
    free(ss.json.nodes);
    free(ss.line);
    return status < 0 ? 1 : 0;
}

#endif /* PLUMB_WIRE_H */
