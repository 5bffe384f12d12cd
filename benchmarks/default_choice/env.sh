export OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1
export PYTHONPATH=<checkout of c82f2bd>:benchmarks/default_choice
PY=python
