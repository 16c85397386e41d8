/* The public calls: check the C arguments, take the GIL, call the bridge, fill C structs. */
#include "pnl_internal.h"

#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static int bad_timeout(const char *call, double timeout_s)
{
    if (!(isfinite(timeout_s) && timeout_s > 0))
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: timeout_s: expected a finite number of seconds > 0, got %g",
                        call, timeout_s);
    return PNL_OK;
}

/* With the GIL held: split the bridge's (object, note) reply. A new reference to the object
 * into *object; PNL_OK for an empty note, else PNL_PENDING with the note as the message. */
static int take_pending_reply(const char *call, PyObject *reply, PyObject **object)
{
    PyObject *item = NULL;
    const char *note = NULL;
    *object = NULL;
    if (reply == NULL || !PyArg_ParseTuple(reply, "Os", &item, &note))
        return pnl_fail_from_python(call);
    Py_INCREF(item);
    *object = item;
    return note[0] == '\0' ? PNL_OK : pnl_fail(PNL_PENDING, "%s: %s", call, note);
}

/* ---- connection ------------------------------------------------------------------------ */

int pnl_connect_with(const char *target, double timeout_s, const char *options, pnl_connection **out)
{
    const char *call = options != NULL ? "pnl_connect_with" : "pnl_connect";
    pnl_clear_error();
    if (out == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: out: expected a pointer to a pnl_connection*, got NULL", call);
    *out = NULL;
    if (target == NULL || target[0] == '\0')
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: target: expected \"host:port\", got %s", call,
                        target == NULL ? "NULL" : "an empty string");
    int status = bad_timeout(call, timeout_s);
    if (status != PNL_OK || (status = pnl_ensure_started()) != PNL_OK)
        return status;
    pnl_connection *connection = calloc(1, sizeof *connection);
    if (connection == NULL)
        return pnl_fail(PNL_INTERNAL, "%s: out of memory", call);
    PyGILState_STATE gil = PyGILState_Ensure();
    PyObject *reply = PyObject_CallMethod(pnl_bridge_module(), "connect", "sds", target, timeout_s,
                                          options != NULL ? options : "");
    status = take_pending_reply(call, reply, &connection->bridge);
    Py_XDECREF(reply);
    PyGILState_Release(gil);
    if (PNL_FAILED(status))
        free(connection);
    else
        *out = connection;
    return status;
}

int pnl_connect(const char *target, double timeout_s, pnl_connection **out)
{
    return pnl_connect_with(target, timeout_s, NULL, out);
}

int pnl_disconnect(pnl_connection *connection)
{
    pnl_clear_error();
    if (connection == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_disconnect: connection: got NULL");
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    PyObject *result = PyObject_CallMethod(connection->bridge, "close", NULL);
    if (result == NULL)
        status = pnl_fail_from_python("pnl_disconnect");
    Py_XDECREF(result);
    Py_DECREF(connection->bridge);
    PyGILState_Release(gil);
    free(connection);
    return status;
}

/* ---- runs ------------------------------------------------------------------------------- */

/* Open or attach: the bridge method with one or two string arguments (token NULL: one). */
static int make_run(const char *call, pnl_connection *connection, const char *method, const char *argument,
                    const char *argument_name, const char *token, pnl_run **out)
{
    pnl_clear_error();
    if (out == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: out: expected a pointer to a pnl_run*, got NULL", call);
    *out = NULL;
    if (connection == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: connection: got NULL (call pnl_connect first)", call);
    if (argument == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: %s: got NULL", call, argument_name);
    pnl_run *run = calloc(1, sizeof *run);
    if (run == NULL)
        return pnl_fail(PNL_INTERNAL, "%s: out of memory", call);
    PyGILState_STATE gil = PyGILState_Ensure();
    PyObject *reply = token != NULL ? PyObject_CallMethod(connection->bridge, method, "ss", argument, token)
                                    : PyObject_CallMethod(connection->bridge, method, "s", argument);
    int status = take_pending_reply(call, reply, &run->bridge);
    Py_XDECREF(reply);
    PyGILState_Release(gil);
    if (PNL_FAILED(status))
        free(run);
    else
        *out = run;
    return status;
}

int pnl_open_run(pnl_connection *connection, const char *spec, pnl_run **out)
{
    return make_run("pnl_open_run", connection, "open_run", spec, "spec", NULL, out);
}

int pnl_attach_run(pnl_connection *connection, const char *run_id, pnl_run **out)
{
    return make_run("pnl_attach_run", connection, "attach_run", run_id, "run_id", NULL, out);
}

int pnl_attach_run_with_token(pnl_connection *connection, const char *run_id, const char *writer_token,
                              pnl_run **out)
{
    if (writer_token == NULL || writer_token[0] == '\0') {
        pnl_clear_error();
        if (out != NULL)
            *out = NULL;
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_attach_run_with_token: writer_token: expected the run's writer "
                                              "token, got %s", writer_token == NULL ? "NULL" : "an empty string");
    }
    return make_run("pnl_attach_run_with_token", connection, "attach_run", run_id, "run_id", writer_token, out);
}

/* A string the bridge method returns into buf; "" means not known yet: PNL_PENDING. */
static int copy_text_reply(const char *call, pnl_run *run, const char *method, const char *what, char *buf,
                           int capacity)
{
    pnl_clear_error();
    if (run == NULL || buf == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: %s: got NULL", call, run == NULL ? "run" : "buf");
    if (capacity < 1)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: capacity: expected at least 1, got %d", call, capacity);
    buf[0] = '\0';
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    PyObject *reply = PyObject_CallMethod(run->bridge, method, NULL);
    const char *utf8 = reply != NULL ? PyUnicode_AsUTF8(reply) : NULL;
    if (utf8 == NULL) {
        status = pnl_fail_from_python(call);
    } else {
        int needed = (int)strlen(utf8) + 1;
        if (capacity < needed)
            status = pnl_fail(PNL_INVALID_ARGUMENT, "%s: capacity: the %s needs %d bytes, got %d", call, what, needed,
                              capacity);
        else if (needed == 1)
            status = pnl_fail(PNL_PENDING, "%s: the run is not open yet; its %s is known once it opens "
                                           "(pnl_link_stats tells when)", call, what);
        else
            memcpy(buf, utf8, (size_t)needed);
    }
    Py_XDECREF(reply);
    PyGILState_Release(gil);
    return status;
}

int pnl_run_id(pnl_run *run, char *buf, int capacity)
{
    return copy_text_reply("pnl_run_id", run, "run_id", "id", buf, capacity);
}

int pnl_writer_token(pnl_run *run, char *buf, int capacity)
{
    return copy_text_reply("pnl_writer_token", run, "writer_token", "writer token", buf, capacity);
}

int pnl_link_stats(pnl_run *run, pnl_link_report *out)
{
    pnl_clear_error();
    if (run == NULL || out == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_link_stats: %s: got NULL", run == NULL ? "run" : "out");
    memset(out, 0, sizeof *out);
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    PyObject *reply = PyObject_CallMethod(run->bridge, "link_stats", NULL);
    if (reply == NULL ||
        !PyArg_ParseTuple(reply, "iiLLLLLLLLLLL", &out->state, &out->link_up, &out->submitted, &out->sent,
                          &out->dropped, &out->refused, &out->queued, &out->dropped_link_down,
                          &out->dropped_queue_full, &out->dropped_retry_time_exceeded, &out->dropped_handle_closed,
                          &out->outages, &out->gaps_recorded))
        status = pnl_fail_from_python("pnl_link_stats");
    Py_XDECREF(reply);
    PyGILState_Release(gil);
    return status;
}

/* Call a bridge method returning None; status. */
static int call_none(const char *call, pnl_run *run, const char *method, const char *format, ...)
{
    if (run == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "%s: run: got NULL", call);
    int status = PNL_OK;
    PyGILState_STATE gil = PyGILState_Ensure();
    va_list args;
    va_start(args, format);
    PyObject *callable = PyObject_GetAttrString(run->bridge, method);
    PyObject *arguments = callable != NULL ? Py_VaBuildValue(format, args) : NULL;
    va_end(args);
    PyObject *result = arguments != NULL ? PyObject_CallObject(callable, arguments) : NULL;
    if (result == NULL)
        status = pnl_fail_from_python(call);
    Py_XDECREF(result);
    Py_XDECREF(arguments);
    Py_XDECREF(callable);
    PyGILState_Release(gil);
    return status;
}

int pnl_run_close(pnl_run *run, int close_on_server, double timeout_s)
{
    pnl_clear_error();
    if (run == NULL)
        return pnl_fail(PNL_INVALID_ARGUMENT, "pnl_run_close: run: got NULL");
    int status = bad_timeout("pnl_run_close", timeout_s);
    if (status == PNL_OK)
        status = call_none("pnl_run_close", run, "close", "(id)", close_on_server != 0, timeout_s);
    PyGILState_STATE gil = PyGILState_Ensure();
    Py_DECREF(run->bridge);
    PyGILState_Release(gil);
    free(run);
    return status;
}

int pnl_flush(pnl_run *run, double timeout_s)
{
    pnl_clear_error();
    int status = bad_timeout("pnl_flush", timeout_s);
    return status != PNL_OK ? status : call_none("pnl_flush", run, "flush", "(d)", timeout_s);
}

int pnl_wait_surfaces(pnl_run *run, long long iteration, double timeout_s)
{
    pnl_clear_error();
    int status = bad_timeout("pnl_wait_surfaces", timeout_s);
    return status != PNL_OK ? status : call_none("pnl_wait_surfaces", run, "wait_surfaces", "(Ld)", iteration, timeout_s);
}
