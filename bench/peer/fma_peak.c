/* f32 fused multiply-add peak probe: each thread runs 24 independent chains of 16-lane
 * AVX-512 fused multiply-adds (8-lane AVX2 ones on a CPU without AVX-512), enough to cover the
 * instruction's latency on both of a core's vector pipes, on registers only, so nothing but the
 * arithmetic is measured.
 * build: gcc -O3 -march=native -fopenmp fma_peak.c -o fma_peak
 * run:   OMP_NUM_THREADS=2 ./fma_peak [iterations_millions=200] [repeats=5]
 * Counts 2 floating-point operations per lane per multiply-add. Prints JSON with the best and
 * median GFLOP/s over the repeats (all threads together). */
#include <immintrin.h>
#include <omp.h>
#include <stdio.h>
#include <stdlib.h>

#define CHAINS 24
#ifdef __AVX512F__
#define LANES 16
typedef __m512 vec;
#define SET1 _mm512_set1_ps
#define FMADD _mm512_fmadd_ps
#define REDUCE _mm512_reduce_add_ps
#else /* AVX2 with FMA: 8 lanes */
#define LANES 8
typedef __m256 vec;
#define SET1 _mm256_set1_ps
#define FMADD _mm256_fmadd_ps
static float REDUCE(__m256 v) {
    float f[8];
    _mm256_storeu_ps(f, v);
    return f[0] + f[1] + f[2] + f[3] + f[4] + f[5] + f[6] + f[7];
}
#endif

static int cmp(const void *a, const void *b) {
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

int main(int argc, char **argv) {
    long iters = (argc > 1 ? atol(argv[1]) : 200) * 1000000L / CHAINS;
    int repeats = argc > 2 ? atoi(argv[2]) : 5;
    double *g = calloc(repeats, sizeof(double));
    float sink = 0.0f;
    int threads = 1;
    for (int r = 0; r < repeats; r++) {
        double t0 = omp_get_wtime();
#pragma omp parallel reduction(+ : sink)
        {
#pragma omp single
            threads = omp_get_num_threads();
            vec acc[CHAINS];
            vec a = SET1(0.999999f), b = SET1(1e-7f);
            for (int c = 0; c < CHAINS; c++) acc[c] = SET1((float)c);
            for (long i = 0; i < iters; i++) {
#pragma GCC unroll 24
                for (int c = 0; c < CHAINS; c++) acc[c] = FMADD(acc[c], a, b);
            }
            for (int c = 0; c < CHAINS; c++) sink += REDUCE(acc[c]);
        }
        double t = omp_get_wtime() - t0;
        g[r] = (double)threads * iters * CHAINS * LANES * 2 / t / 1e9;
    }
    qsort(g, repeats, sizeof(double), cmp);
    printf("{\"threads\": %d, \"fma_f32_best_GFLOPs\": %.1f, \"fma_f32_median_GFLOPs\": %.1f, "
           "\"sink\": %g}\n",
           threads, g[repeats - 1], g[repeats / 2], (double)sink);
    return 0;
}
