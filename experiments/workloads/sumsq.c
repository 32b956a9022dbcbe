/* Demo workload: a small numeric kernel whose speed depends on the
 * optimisation level. Sums squares of a pseudo-random array N times. */
#include <stdio.h>
#include <stdlib.h>

int main(int argc, char **argv) {
    long n = argc > 1 ? atol(argv[1]) : 1000000;
    int reps = argc > 2 ? atoi(argv[2]) : 20;
    double *x = malloc(sizeof(double) * (size_t)n);
    if (!x) { fprintf(stderr, "out of memory\n"); return 1; }
    unsigned long s = 12345;
    for (long i = 0; i < n; i++) { s = s * 6364136223846793005UL + 1442695040888963407UL; x[i] = (double)(s >> 40) / 16777216.0; }
    double total = 0;
    for (int r = 0; r < reps; r++)
        for (long i = 0; i < n; i++) total += x[i] * x[i] * (1.0 + r * 1e-9);
    printf("{\"checksum\": %.6f}\n", total);
    free(x);
    return 0;
}
