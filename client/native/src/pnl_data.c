/* Data across the boundary: patches in (views of the caller's memory, no copy here), surfaces
 * and guidance out (into the caller's structs). */
#include "pnl_internal.h"

#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

static void copy_label(char *dest, const char *src)
{
    snprintf(dest, PNL_LABEL_CAPACITY, "%s", src != NULL ? src : "");
}

/* Every C-level check of one patch, before Python sees it; *bytes gets one field's size. */
static int check_patch(const pnl_patch *p, int index, Py_ssize_t *bytes)
{
    const char *call = "pnl_submit";
    if (p->field_count < 1)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: patches[%d].field_count: expected at least 1, got %d", call, index,
                        p->field_count);
    if (p->field_names == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: patches[%d].field_names: got NULL", call, index);
    if (p->field_data == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: patches[%d].field_data: got NULL", call, index);
    for (int f = 0; f < p->field_count; ++f)
        if (p->field_data[f] == NULL)
            return pnl_fail(PNL_INVALID_ARGUMENT, "%s: patches[%d].field_data[%d]: got NULL", call, index, f);
    if (p->memory_order != PNL_ORDER_C && p->memory_order != PNL_ORDER_FORTRAN)
        return pnl_fail(PNL_INVALID_ARGUMENT,
                        "%s: patches[%d].memory_order: expected PNL_ORDER_C (0) or PNL_ORDER_FORTRAN (1), got %d",
                        call, index, p->memory_order);
    uint64_t nodes = 1;
    for (int d = 0; d < 3; ++d) {
        if (p->shape[d] < 2)
            return pnl_fail(PNL_INVALID_ARGUMENT, "%s: patches[%d].shape[%d]: expected at least 2 nodes, got %d", call,
                            index, d, p->shape[d]);
        nodes *= (uint64_t)p->shape[d];
    }
    if (nodes > (uint64_t)PY_SSIZE_T_MAX / sizeof(double))
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: patches[%d].shape: %llu nodes is too many", call, index,
                        (unsigned long long)nodes);
    *bytes = (Py_ssize_t)(nodes * sizeof(double));
    return PNL_OK;
}

/* The bridge's tuple for one patch; its memoryviews are appended to views (to release later). */
static PyObject *patch_tuple(const pnl_patch *p, Py_ssize_t bytes, PyObject *views)
{
    PyObject *fields = PyList_New(0);
    if (fields == NULL)
        return NULL;
    for (int f = 0; f < p->field_count; ++f) {
        /* Read-only view of the caller's doubles: numpy reads it in place (no copy here). */
        PyObject *view = PyMemoryView_FromMemory((char *)p->field_data[f], bytes, PyBUF_READ);
        if (view == NULL || PyList_Append(fields, view) != 0 || PyList_Append(views, view) != 0) {
            Py_XDECREF(view);
            Py_DECREF(fields);
            return NULL;
        }
        Py_DECREF(view);
    }
    PyObject *entry = Py_BuildValue("(sO(iii)(ddd)(ddd)is)", p->field_names, fields, p->shape[0], p->shape[1],
                                    p->shape[2], p->spacing[0], p->spacing[1], p->spacing[2], p->origin[0],
                                    p->origin[1], p->origin[2], p->level,
                                    p->memory_order == PNL_ORDER_FORTRAN ? "F" : "C");
    Py_DECREF(fields);
    return entry;
}

/* Release every view; a view still exported means Python kept a reference to caller memory. */
static int release_views(PyObject *views)
{
    int stuck = 0;
    for (Py_ssize_t i = 0; views != NULL && i < PyList_GET_SIZE(views); ++i) {
        PyObject *view = PyList_GET_ITEM(views, i);
        PyObject *done = PyObject_CallMethod(view, "release", NULL);
        if (done == NULL) { /* an array still alive (e.g. held by a reference cycle): collect, retry */
            PyErr_Clear();
            PyGC_Collect();
            done = PyObject_CallMethod(view, "release", NULL);
        }
        if (done == NULL) {
            PyErr_Clear();
            stuck = 1;
        }
        Py_XDECREF(done);
    }
    return stuck;
}

int pnl_submit(pnl_run *run, double time, long long iteration, int rank, int nranks, const pnl_patch *patches,
               int patch_count)
{
    pnl_clear_error();
    if (run == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_submit: run: got NULL");
    if (patches == NULL || patch_count < 1)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_submit: %s", patches == NULL ? "patches: got NULL"
                                                                                 : "patch_count: expected at least 1");
    if (nranks < 1 || rank < 0 || rank >= nranks)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_submit: rank: expected 0 <= rank < nranks, got rank %d of nranks %d",
                        rank, nranks);
    Py_ssize_t bytes;
    for (int i = 0; i < patch_count; ++i) {
        int status = check_patch(&patches[i], i, &bytes);
        if (status != PNL_OK)
            return status;
    }
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    PyObject *views = PyList_New(0);
    PyObject *entries = views != NULL ? PyList_New(0) : NULL;
    for (int i = 0; entries != NULL && i < patch_count; ++i) {
        (void)check_patch(&patches[i], i, &bytes); /* checked above: only its size is wanted */
        PyObject *entry = patch_tuple(&patches[i], bytes, views);
        if (entry == NULL || PyList_Append(entries, entry) != 0)
            Py_CLEAR(entries);
        Py_XDECREF(entry);
    }
    PyObject *result = entries != NULL ? PyObject_CallMethod(run->bridge, "submit", "dLiiO", time, iteration, rank,
                                                             nranks, entries) : NULL;
    if (result == NULL)
        status = pnl_fail_from_python("pnl_submit");
    Py_XDECREF(result);
    Py_XDECREF(entries);
    if (release_views(views) && status == PNL_OK)
        status = pnl_fail(PNL_INTERNAL, "pnl_submit: a view of the caller's memory outlived the call");
    Py_XDECREF(views);
    PyGILState_Release(gil);
    return status;
}

/* ---- results -------------------------------------------------------------------------------- */

static int fill_surface(PyObject *row, pnl_surface *s)
{
    const char *label;
    int ever, latest;
    if (!PyArg_ParseTuple(row, "sppLiLd(ddd)ddd", &label, &ever, &latest, &s->latest_attempt_iteration,
                          &s->consecutive_misses, &s->found_iteration, &s->found_time, &s->centroid[0],
                          &s->centroid[1], &s->centroid[2], &s->area, &s->irreducible_mass, &s->radius_mean))
        return -1;
    copy_label(s->label, label);
    s->ever_found = ever;
    s->latest_attempt_found = latest;
    return 0;
}

int pnl_latest_surfaces(pnl_run *run, int refresh, pnl_surface *out, int capacity, int *count)
{
    pnl_clear_error();
    if (run == NULL || count == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_latest_surfaces: %s: got NULL", run == NULL ? "run" : "count");
    if (capacity < 0 || (capacity > 0 && out == NULL))
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_latest_surfaces: out/capacity: expected an array of capacity >= 0, "
                                              "got %s with capacity %d", out == NULL ? "NULL" : "an array", capacity);
    *count = 0;
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    PyObject *rows = PyObject_CallMethod(run->bridge, "surfaces", "(i)", refresh != 0);
    PyObject *seq = rows != NULL ? PySequence_Fast(rows, "surfaces") : NULL;
    if (seq == NULL) {
        status = pnl_fail_from_python("pnl_latest_surfaces");
    } else {
        Py_ssize_t n = PySequence_Fast_GET_SIZE(seq);
        for (Py_ssize_t i = 0; i < n && i < capacity && status == PNL_OK; ++i)
            if (fill_surface(PySequence_Fast_GET_ITEM(seq, i), &out[i]) != 0)
                status = pnl_fail_from_python("pnl_latest_surfaces");
        *count = (int)n;
    }
    Py_XDECREF(seq);
    Py_XDECREF(rows);
    PyGILState_Release(gil);
    return status;
}

/* A sequence of floats into values[0 .. PNL_MAX_LEVELS); returns how many, -1 on error. */
static int fill_levels(PyObject *sequence, double *values)
{
    PyObject *seq = PySequence_Fast(sequence, "levels");
    if (seq == NULL)
        return -1;
    Py_ssize_t n = PySequence_Fast_GET_SIZE(seq);
    int kept = n < PNL_MAX_LEVELS ? (int)n : PNL_MAX_LEVELS;
    for (int i = 0; i < kept; ++i)
        values[i] = PyFloat_AsDouble(PySequence_Fast_GET_ITEM(seq, i));
    Py_DECREF(seq);
    return PyErr_Occurred() ? -1 : kept;
}

static int fill_body(PyObject *row, pnl_body_guidance *b)
{
    const char *label;
    PyObject *radii, *spacings;
    if (!PyArg_ParseTuple(row, "s(ddd)iOOd", &label, &b->centre[0], &b->centre[1], &b->centre[2], &b->finest_level,
                          &radii, &spacings, &b->finest_spacing))
        return -1;
    copy_label(b->label, label);
    for (int i = 0; i < PNL_MAX_LEVELS; ++i)
        b->radii[i] = b->spacings[i] = NAN;
    int levels = fill_levels(radii, b->radii);
    if (levels < 0 || fill_levels(spacings, b->spacings) < 0)
        return -1;
    b->level_count = levels;
    return 0;
}

int pnl_latest_guidance(pnl_run *run, int refresh, pnl_guidance_info *info, pnl_body_guidance *bodies, int capacity)
{
    pnl_clear_error();
    if (run == NULL || info == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_latest_guidance: %s: got NULL", run == NULL ? "run" : "info");
    if (capacity < 0 || (capacity > 0 && bodies == NULL))
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_latest_guidance: bodies/capacity: expected an array of capacity "
                                              ">= 0, got %s with capacity %d", bodies == NULL ? "NULL" : "an array",
                        capacity);
    memset(info, 0, sizeof *info);
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    PyObject *reply = PyObject_CallMethod(run->bridge, "guidance", "(i)", refresh != 0);
    PyObject *rows = NULL, *seq = NULL;
    if (reply == NULL) {
        status = pnl_fail_from_python("pnl_latest_guidance");
    } else if (reply == Py_None) {
        status = pnl_fail(PNL_NOT_FOUND, "pnl_latest_guidance: the server has issued no guidance for this run yet");
    } else if (!PyArg_ParseTuple(reply, "(dLddp)O", &info->time, &info->iteration, &info->valid_from,
                                 &info->valid_until, &info->post_merger, &rows) ||
               (seq = PySequence_Fast(rows, "bodies")) == NULL) {
        status = pnl_fail_from_python("pnl_latest_guidance");
    } else {
        Py_ssize_t n = PySequence_Fast_GET_SIZE(seq);
        for (Py_ssize_t i = 0; i < n && i < capacity && status == PNL_OK; ++i)
            if (fill_body(PySequence_Fast_GET_ITEM(seq, i), &bodies[i]) != 0)
                status = pnl_fail_from_python("pnl_latest_guidance");
        info->body_count = (int)n;
    }
    Py_XDECREF(seq);
    Py_XDECREF(reply);
    PyGILState_Release(gil);
    return status;
}
