/*
 * gateway._gf: linear combinations of byte buffers over GF(2^8), the
 * arithmetic of Shoal's Reed-Solomon code (field polynomial
 * x^8 + x^4 + x^3 + x^2 + 1, 0x11d; generator x).
 *
 *     combine(inputs, matrix) -> [bytes, ...]
 *
 * returns m = len(matrix) / len(inputs) new buffers, output r being
 * sum_j matrix[r * len(inputs) + j] * inputs[j], byte by byte. The inputs
 * have one length. The GIL is released while it computes, so two threads
 * code on two cores.
 *
 * The product c * b is looked up by nibbles: c * b = c * (b & 15) ^
 * c * (b & 0xf0), two 16-entry tables per coefficient. On x86 with AVX2 or
 * SSSE3 the table lookups are byte shuffles, 32 or 16 bytes at a time (the
 * split-table method published by Plank, Greenan and Miller, "Screaming
 * fast Galois field arithmetic using Intel SIMD instructions", FAST 2013;
 * cited from memory); elsewhere the same tables are used a byte at a time.
 * The kernel is chosen at import from what the CPU reports; kernel() names
 * it and set_kernel() picks another (tests run every one).
 *
 * codec.py works out the matrices (Lagrange coefficients of the code's
 * evaluation points) and falls back to zfec when this module is missing;
 * tests/test_codec.py checks that both give the same bytes.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <string.h>

#if defined(__x86_64__) || defined(__i386__)
#include <immintrin.h>
#define SHOAL_X86 1
#endif

#define BLOCK 16384 /* bytes of every buffer per pass: inputs stay in cache across outputs */

static uint8_t gf_exp[510];
static uint8_t gf_log[256];
static uint8_t mul_lo[256][16]; /* c * x for x in 0..15 */
static uint8_t mul_hi[256][16]; /* c * (x << 4) */

static uint8_t gf_mul(uint8_t a, uint8_t b)
{
    if (a == 0 || b == 0)
        return 0;
    return gf_exp[gf_log[a] + gf_log[b]];
}

static void init_tables(void)
{
    unsigned v = 1;
    for (int i = 0; i < 255; i++) {
        gf_exp[i] = (uint8_t)v;
        gf_log[v] = (uint8_t)i;
        v <<= 1;
        if (v & 0x100)
            v ^= 0x11d;
    }
    for (int i = 255; i < 510; i++)
        gf_exp[i] = gf_exp[i - 255];
    for (int c = 0; c < 256; c++)
        for (int x = 0; x < 16; x++) {
            mul_lo[c][x] = gf_mul((uint8_t)c, (uint8_t)x);
            mul_hi[c][x] = gf_mul((uint8_t)c, (uint8_t)(x << 4));
        }
}

/* dst (^)= c * src over n bytes; assign: overwrite instead of accumulate. */
typedef void (*kernel_fn)(uint8_t *dst, const uint8_t *src, size_t n, uint8_t c, int assign);

static void muladd_bytes(uint8_t *dst, const uint8_t *src, size_t n, uint8_t c, int assign)
{
    const uint8_t *lo = mul_lo[c], *hi = mul_hi[c];
    if (assign)
        for (size_t i = 0; i < n; i++)
            dst[i] = lo[src[i] & 15] ^ hi[src[i] >> 4];
    else
        for (size_t i = 0; i < n; i++)
            dst[i] ^= lo[src[i] & 15] ^ hi[src[i] >> 4];
}

#ifdef SHOAL_X86
__attribute__((target("ssse3")))
static void muladd_ssse3(uint8_t *dst, const uint8_t *src, size_t n, uint8_t c, int assign)
{
    const __m128i lo = _mm_loadu_si128((const __m128i *)mul_lo[c]);
    const __m128i hi = _mm_loadu_si128((const __m128i *)mul_hi[c]);
    const __m128i mask = _mm_set1_epi8(0x0f);
    size_t i = 0;
    for (; i + 16 <= n; i += 16) {
        __m128i s = _mm_loadu_si128((const __m128i *)(src + i));
        __m128i p = _mm_xor_si128(_mm_shuffle_epi8(lo, _mm_and_si128(s, mask)),
                                  _mm_shuffle_epi8(hi, _mm_and_si128(_mm_srli_epi64(s, 4), mask)));
        if (!assign)
            p = _mm_xor_si128(p, _mm_loadu_si128((const __m128i *)(dst + i)));
        _mm_storeu_si128((__m128i *)(dst + i), p);
    }
    muladd_bytes(dst + i, src + i, n - i, c, assign);
}

__attribute__((target("avx2")))
static void muladd_avx2(uint8_t *dst, const uint8_t *src, size_t n, uint8_t c, int assign)
{
    const __m256i lo = _mm256_broadcastsi128_si256(_mm_loadu_si128((const __m128i *)mul_lo[c]));
    const __m256i hi = _mm256_broadcastsi128_si256(_mm_loadu_si128((const __m128i *)mul_hi[c]));
    const __m256i mask = _mm256_set1_epi8(0x0f);
    size_t i = 0;
    for (; i + 32 <= n; i += 32) {
        __m256i s = _mm256_loadu_si256((const __m256i *)(src + i));
        __m256i p = _mm256_xor_si256(_mm256_shuffle_epi8(lo, _mm256_and_si256(s, mask)),
                                     _mm256_shuffle_epi8(hi, _mm256_and_si256(_mm256_srli_epi64(s, 4), mask)));
        if (!assign)
            p = _mm256_xor_si256(p, _mm256_loadu_si256((const __m256i *)(dst + i)));
        _mm256_storeu_si256((__m256i *)(dst + i), p);
    }
    muladd_bytes(dst + i, src + i, n - i, c, assign);
}
#endif

static kernel_fn kernel = muladd_bytes;
static const char *kernel_name = "bytes";

static void choose_kernel(void)
{
#ifdef SHOAL_X86
    __builtin_cpu_init();
    if (__builtin_cpu_supports("avx2")) {
        kernel = muladd_avx2;
        kernel_name = "avx2";
    } else if (__builtin_cpu_supports("ssse3")) {
        kernel = muladd_ssse3;
        kernel_name = "ssse3";
    }
#endif
}

static void combine_blocks(uint8_t **out, Py_ssize_t m, const uint8_t **in, Py_ssize_t k,
                           const uint8_t *matrix, size_t length)
{
    for (size_t off = 0; off < length; off += BLOCK) {
        size_t n = length - off < BLOCK ? length - off : BLOCK;
        for (Py_ssize_t r = 0; r < m; r++) {
            const uint8_t *row = matrix + r * k;
            int assigned = 0;
            for (Py_ssize_t j = 0; j < k; j++) {
                uint8_t c = row[j];
                if (c == 0)
                    continue;
                kernel(out[r] + off, in[j] + off, n, c, !assigned);
                assigned = 1;
            }
            if (!assigned)
                memset(out[r] + off, 0, n);
        }
    }
}

static PyObject *gf_combine(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *inputs;
    Py_buffer matrix;
    if (!PyArg_ParseTuple(args, "Oy*", &inputs, &matrix))
        return NULL;
    PyObject *result = NULL;
    PyObject *ins = PySequence_Fast(inputs, "inputs must be a sequence of buffers");
    Py_buffer *views = NULL;
    uint8_t **optr = NULL;
    const uint8_t **iptr = NULL;
    Py_ssize_t m = 0, k = 0, got = 0, length = -1;
    if (!ins)
        goto done;
    k = PySequence_Fast_GET_SIZE(ins);
    if (k < 1 || matrix.len % k != 0) {
        PyErr_Format(PyExc_ValueError, "matrix has %zd coefficients, not a multiple of the %zd inputs", matrix.len, k);
        goto done;
    }
    m = matrix.len / k;
    views = PyMem_Calloc((size_t)k, sizeof(Py_buffer));
    optr = PyMem_Calloc((size_t)(m ? m : 1), sizeof(uint8_t *));
    iptr = PyMem_Calloc((size_t)k, sizeof(uint8_t *));
    if (!views || !optr || !iptr) {
        PyErr_NoMemory();
        goto done;
    }
    for (Py_ssize_t j = 0; j < k; j++) {
        if (PyObject_GetBuffer(PySequence_Fast_GET_ITEM(ins, j), &views[j], PyBUF_C_CONTIGUOUS) < 0)
            goto done;
        got = j + 1;
        if (length < 0)
            length = views[j].len;
        else if (views[j].len != length) {
            PyErr_Format(PyExc_ValueError, "inputs differ in length (%zd and %zd bytes)", length, views[j].len);
            goto done;
        }
        iptr[j] = views[j].buf;
    }
    result = PyList_New(m);
    if (!result)
        goto done;
    for (Py_ssize_t r = 0; r < m; r++) {
        /* Not initialised: combine_blocks writes every byte before anyone sees it. */
        PyObject *out = PyBytes_FromStringAndSize(NULL, length);
        if (!out) {
            Py_CLEAR(result);
            goto done;
        }
        optr[r] = (uint8_t *)PyBytes_AS_STRING(out);
        PyList_SET_ITEM(result, r, out);
    }
    Py_BEGIN_ALLOW_THREADS
    combine_blocks(optr, m, iptr, k, matrix.buf, (size_t)length);
    Py_END_ALLOW_THREADS
done:
    for (Py_ssize_t j = 0; j < got; j++)
        PyBuffer_Release(&views[j]);
    PyMem_Free(views);
    PyMem_Free(optr);
    PyMem_Free(iptr);
    Py_XDECREF(ins);
    PyBuffer_Release(&matrix);
    return result;
}

static PyObject *gf_kernel(PyObject *self, PyObject *unused)
{
    (void)self, (void)unused;
    return PyUnicode_FromString(kernel_name);
}

static int append_name(PyObject *names, const char *name)
{
    PyObject *s = PyUnicode_FromString(name);
    if (!s)
        return -1;
    int rc = PyList_Append(names, s);
    Py_DECREF(s);
    return rc;
}

static PyObject *gf_kernels(PyObject *self, PyObject *unused)
{
    (void)self, (void)unused;
    PyObject *names = PyList_New(0);
    if (!names)
        return NULL;
#ifdef SHOAL_X86
    if (__builtin_cpu_supports("avx2") && append_name(names, "avx2") < 0)
        goto fail;
    if (__builtin_cpu_supports("ssse3") && append_name(names, "ssse3") < 0)
        goto fail;
#endif
    if (append_name(names, "bytes") < 0)
        goto fail;
    return names;
fail:
    Py_DECREF(names);
    return NULL;
}

static PyObject *gf_set_kernel(PyObject *self, PyObject *args)
{
    (void)self;
    const char *name;
    if (!PyArg_ParseTuple(args, "s", &name))
        return NULL;
    if (strcmp(name, "bytes") == 0) {
        kernel = muladd_bytes;
        kernel_name = "bytes";
        Py_RETURN_NONE;
    }
#ifdef SHOAL_X86
    if (strcmp(name, "avx2") == 0 && __builtin_cpu_supports("avx2")) {
        kernel = muladd_avx2;
        kernel_name = "avx2";
        Py_RETURN_NONE;
    }
    if (strcmp(name, "ssse3") == 0 && __builtin_cpu_supports("ssse3")) {
        kernel = muladd_ssse3;
        kernel_name = "ssse3";
        Py_RETURN_NONE;
    }
#endif
    PyErr_Format(PyExc_ValueError, "kernel %s is not available on this CPU", name);
    return NULL;
}

static PyMethodDef methods[] = {
    {"combine", gf_combine, METH_VARARGS,
     "combine(inputs, matrix) -> list of bytes: output r = sum of matrix[r*k + j] * inputs[j] over GF(2^8) (0x11d)."},
    {"kernel", gf_kernel, METH_NOARGS, "kernel(): the name of the kernel in use (avx2, ssse3 or bytes)."},
    {"kernels", gf_kernels, METH_NOARGS, "kernels(): the kernels this CPU can run, fastest first."},
    {"set_kernel", gf_set_kernel, METH_VARARGS, "set_kernel(name): use another kernel (for tests and benchmarks)."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "gateway._gf",
    "Linear combinations of byte buffers over GF(2^8), for gateway.codec.", -1, methods,
};

PyMODINIT_FUNC PyInit__gf(void)
{
    init_tables();
    choose_kernel();
    return PyModule_Create(&module);
}
