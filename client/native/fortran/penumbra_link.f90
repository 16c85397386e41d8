! penumbra_link: Fortran interface to Penumbra (hand 3+1 slices to a horizon server) over the
! C library libpenumbra_link (include/penumbra_link.h). Compile this file with your own
! compiler (.mod files are compiler-specific) and link with `penumbra-link-config --libs`.
!
! Every function returns an integer status, one of the PNL_* codes below. A call failed if and
! only if pnl_failed(status), i.e. status is neither PNL_OK nor PNL_PENDING: PNL_PENDING means the
! connection or run handle is usable but the server has not answered yet (it keeps trying in the
! background; slices queue, keep newest, and drops are counted: pnl_link_stats). After a failure
! or PNL_PENDING, pnl_last_error() gives the message (per thread). Nothing here stops the program.
!
! Arrays: a field u(nx, ny, nz) indexed (i, j, k) along (x, y, z) is passed as c_loc(u) with no
! copy on the caller's side (u needs the TARGET attribute and must be contiguous); pnl_submit
! copies it before returning, so u may be overwritten at once. Strings are Fortran strings
! here; the wrappers add the NUL the C side needs. Units: G = c = 1, lengths in M.
! Thread safety: as in penumbra_link.h (any thread; closing calls last on their handle).
module penumbra_link
  use, intrinsic :: iso_c_binding
  implicit none
  private

  integer(c_int), parameter, public :: PNL_OK = 0, PNL_INVALID_ARGUMENT = 1, PNL_UNAVAILABLE = 2, &
       PNL_TIMEOUT = 3, PNL_NOT_FOUND = 4, PNL_FAILED_PRECONDITION = 5, PNL_RESOURCE_EXHAUSTED = 6, &
       PNL_REFUSED = 7, PNL_UNIMPLEMENTED = 8, PNL_PYTHON_ERROR = 9, PNL_INTERNAL = 10, PNL_PENDING = 11, &
       PNL_UNAUTHENTICATED = 12, PNL_PERMISSION_DENIED = 13
  integer(c_int), parameter, public :: PNL_RUN_PENDING = 0, PNL_RUN_OPEN = 1, PNL_RUN_FAILED = 2, PNL_RUN_CLOSED = 3
  integer(c_int), parameter, public :: PNL_ORDER_C = 0, PNL_ORDER_FORTRAN = 1
  integer, parameter, public :: PNL_LABEL_CAPACITY = 33, PNL_MAX_LEVELS = 16, PNL_RUN_ID_CAPACITY = 64, &
       PNL_WRITER_TOKEN_CAPACITY = 128

  !> Handles (opaque; made by pnl_connect / pnl_open_run / pnl_attach_run).
  type, public :: pnl_connection
     type(c_ptr) :: handle = c_null_ptr
  end type pnl_connection
  type, public :: pnl_run
     type(c_ptr) :: handle = c_null_ptr
  end type pnl_run

  !> One patch as the caller describes it: comma-separated field names, c_loc of each field
  !> u(nx, ny, nz) (Fortran order), node counts, spacing and origin (M), refinement level.
  type, public :: pnl_fortran_patch
     character(len=:), allocatable :: field_names
     type(c_ptr), allocatable :: field_data(:)
     integer :: shape(3) = 0
     real(c_double) :: spacing(3) = 0, origin(3) = 0
     integer :: level = 0
  end type pnl_fortran_patch

  !> The C structs of penumbra_link.h (same layout).
  type, bind(C), public :: pnl_c_patch
     type(c_ptr) :: field_names
     integer(c_int) :: field_count
     type(c_ptr) :: field_data
     integer(c_int) :: shape(3)
     real(c_double) :: spacing(3), origin(3)
     integer(c_int) :: level, memory_order
  end type pnl_c_patch

  type, bind(C), public :: pnl_body_guidance
     character(kind=c_char) :: label(PNL_LABEL_CAPACITY)
     real(c_double) :: centre(3)
     integer(c_int) :: finest_level, level_count
     real(c_double) :: radii(PNL_MAX_LEVELS), spacings(PNL_MAX_LEVELS)
     real(c_double) :: finest_spacing
  end type pnl_body_guidance

  type, bind(C), public :: pnl_guidance_info
     real(c_double) :: time
     integer(c_long_long) :: iteration
     real(c_double) :: valid_from, valid_until
     integer(c_int) :: post_merger, body_count
  end type pnl_guidance_info

  type, bind(C), public :: pnl_surface
     character(kind=c_char) :: label(PNL_LABEL_CAPACITY)
     integer(c_int) :: ever_found, latest_attempt_found
     integer(c_long_long) :: latest_attempt_iteration
     integer(c_int) :: consecutive_misses
     integer(c_long_long) :: found_iteration
     real(c_double) :: found_time, centroid(3), area, irreducible_mass, radius_mean
  end type pnl_surface

  !> The link of one run handle (pnl_link_stats; fields as in penumbra_link.h).
  type, bind(C), public :: pnl_link_report
     integer(c_int) :: state, link_up
     integer(c_long_long) :: submitted, sent, dropped, refused, queued
     integer(c_long_long) :: dropped_link_down, dropped_queue_full, dropped_retry_time_exceeded, dropped_handle_closed
     integer(c_long_long) :: outages, gaps_recorded
  end type pnl_link_report

  public :: pnl_init, pnl_connect, pnl_connect_with, pnl_disconnect, pnl_open_run, pnl_attach_run, &
       pnl_attach_run_with_token, pnl_run_id, pnl_writer_token, pnl_link_stats, pnl_run_close, &
       pnl_submit, pnl_flush, pnl_wait_surfaces, pnl_latest_surfaces, pnl_latest_guidance, pnl_last_error, &
       pnl_status_name, pnl_label, pnl_failed

  interface
     integer(c_int) function c_init() bind(C, name="pnl_init")
       import :: c_int
     end function c_init
     integer(c_int) function c_connect(target, timeout_s, out) bind(C, name="pnl_connect")
       import :: c_int, c_char, c_double, c_ptr
       character(kind=c_char), intent(in) :: target(*)
       real(c_double), value :: timeout_s
       type(c_ptr), intent(out) :: out
     end function c_connect
     integer(c_int) function c_connect_with(target, timeout_s, options, out) bind(C, name="pnl_connect_with")
       import :: c_int, c_char, c_double, c_ptr
       character(kind=c_char), intent(in) :: target(*), options(*)
       real(c_double), value :: timeout_s
       type(c_ptr), intent(out) :: out
     end function c_connect_with
     integer(c_int) function c_disconnect(connection) bind(C, name="pnl_disconnect")
       import :: c_int, c_ptr
       type(c_ptr), value :: connection
     end function c_disconnect
     integer(c_int) function c_open_run(connection, spec, out) bind(C, name="pnl_open_run")
       import :: c_int, c_char, c_ptr
       type(c_ptr), value :: connection
       character(kind=c_char), intent(in) :: spec(*)
       type(c_ptr), intent(out) :: out
     end function c_open_run
     integer(c_int) function c_attach_run(connection, run_id, out) bind(C, name="pnl_attach_run")
       import :: c_int, c_char, c_ptr
       type(c_ptr), value :: connection
       character(kind=c_char), intent(in) :: run_id(*)
       type(c_ptr), intent(out) :: out
     end function c_attach_run
     integer(c_int) function c_attach_run_with_token(connection, run_id, writer_token, out) &
          bind(C, name="pnl_attach_run_with_token")
       import :: c_int, c_char, c_ptr
       type(c_ptr), value :: connection
       character(kind=c_char), intent(in) :: run_id(*), writer_token(*)
       type(c_ptr), intent(out) :: out
     end function c_attach_run_with_token
     integer(c_int) function c_writer_token(run, buf, capacity) bind(C, name="pnl_writer_token")
       import :: c_int, c_char, c_ptr
       type(c_ptr), value :: run
       character(kind=c_char), intent(out) :: buf(*)
       integer(c_int), value :: capacity
     end function c_writer_token
     integer(c_int) function c_link_stats(run, out) bind(C, name="pnl_link_stats")
       import :: c_int, c_ptr, pnl_link_report
       type(c_ptr), value :: run
       type(pnl_link_report), intent(out) :: out
     end function c_link_stats
     integer(c_int) function c_run_id(run, buf, capacity) bind(C, name="pnl_run_id")
       import :: c_int, c_char, c_ptr
       type(c_ptr), value :: run
       character(kind=c_char), intent(out) :: buf(*)
       integer(c_int), value :: capacity
     end function c_run_id
     integer(c_int) function c_run_close(run, close_on_server, timeout_s) bind(C, name="pnl_run_close")
       import :: c_int, c_double, c_ptr
       type(c_ptr), value :: run
       integer(c_int), value :: close_on_server
       real(c_double), value :: timeout_s
     end function c_run_close
     integer(c_int) function c_submit(run, time, iteration, rank, nranks, patches, patch_count) &
          bind(C, name="pnl_submit")
       import :: c_int, c_double, c_long_long, c_ptr
       type(c_ptr), value :: run
       real(c_double), value :: time
       integer(c_long_long), value :: iteration
       integer(c_int), value :: rank, nranks
       type(c_ptr), value :: patches
       integer(c_int), value :: patch_count
     end function c_submit
     integer(c_int) function c_flush(run, timeout_s) bind(C, name="pnl_flush")
       import :: c_int, c_double, c_ptr
       type(c_ptr), value :: run
       real(c_double), value :: timeout_s
     end function c_flush
     integer(c_int) function c_wait_surfaces(run, iteration, timeout_s) bind(C, name="pnl_wait_surfaces")
       import :: c_int, c_double, c_long_long, c_ptr
       type(c_ptr), value :: run
       integer(c_long_long), value :: iteration
       real(c_double), value :: timeout_s
     end function c_wait_surfaces
     integer(c_int) function c_latest_surfaces(run, refresh, out, capacity, count) bind(C, name="pnl_latest_surfaces")
       import :: c_int, c_ptr, pnl_surface
       type(c_ptr), value :: run
       integer(c_int), value :: refresh
       type(pnl_surface), intent(inout) :: out(*)
       integer(c_int), value :: capacity
       integer(c_int), intent(out) :: count
     end function c_latest_surfaces
     integer(c_int) function c_latest_guidance(run, refresh, info, bodies, capacity) bind(C, name="pnl_latest_guidance")
       import :: c_int, c_ptr, pnl_guidance_info, pnl_body_guidance
       type(c_ptr), value :: run
       integer(c_int), value :: refresh
       type(pnl_guidance_info), intent(out) :: info
       type(pnl_body_guidance), intent(inout) :: bodies(*)
       integer(c_int), value :: capacity
     end function c_latest_guidance
     integer(c_int) function c_last_error_copy(buf, capacity) bind(C, name="pnl_last_error_copy")
       import :: c_int, c_char
       character(kind=c_char), intent(out) :: buf(*)
       integer(c_int), value :: capacity
     end function c_last_error_copy
     type(c_ptr) function c_status_name(status) bind(C, name="pnl_status_name")
       import :: c_int, c_ptr
       integer(c_int), value :: status
     end function c_status_name
     integer(c_size_t) function c_strlen(text) bind(C, name="strlen")
       import :: c_size_t, c_ptr
       type(c_ptr), value :: text
     end function c_strlen
  end interface

  !> One C-side patch list for the duration of a pnl_submit call (names with their NULs).
  type :: names_buffer
     character(kind=c_char), allocatable :: text(:)
  end type names_buffer

contains

  !> text as a NUL-terminated c_char array.
  pure function c_string(text) result(buf)
    character(len=*), intent(in) :: text
    character(kind=c_char) :: buf(len_trim(text) + 1)
    integer :: i
    do i = 1, len_trim(text)
       buf(i) = text(i:i)
    end do
    buf(len_trim(text) + 1) = c_null_char
  end function c_string

  !> A label (or any NUL-terminated c_char array) as a Fortran string.
  function pnl_label(chars) result(text)
    character(kind=c_char), intent(in) :: chars(:)
    character(len=:), allocatable :: text
    integer :: n
    n = 0
    do while (n < size(chars))
       if (chars(n + 1) == c_null_char) exit
       n = n + 1
    end do
    allocate(character(len=n) :: text)
    text = transfer(chars(1:n), text)
  end function pnl_label

  integer function pnl_init() result(status)
    status = c_init()
  end function pnl_init

  !> .true. if status is a failure: neither PNL_OK nor PNL_PENDING.
  elemental logical function pnl_failed(status)
    integer, intent(in) :: status
    pnl_failed = status /= PNL_OK .and. status /= PNL_PENDING
  end function pnl_failed

  !> Connect to target ("host:port"), waiting at most timeout_s seconds for the server to answer
  !> (PNL_PENDING if it did not: the connection is usable and keeps trying).
  integer function pnl_connect(target, timeout_s, connection) result(status)
    character(len=*), intent(in) :: target
    real(c_double), intent(in) :: timeout_s
    type(pnl_connection), intent(out) :: connection
    status = c_connect(c_string(target), timeout_s, connection%handle)
  end function pnl_connect

  !> pnl_connect with TLS and tokens: options "token=...; token_file=PATH; tls=1; tls_ca=PATH;
  !> tls_cert=PATH; tls_key=PATH" (see penumbra_link.h; "" for none).
  integer function pnl_connect_with(target, timeout_s, options, connection) result(status)
    character(len=*), intent(in) :: target, options
    real(c_double), intent(in) :: timeout_s
    type(pnl_connection), intent(out) :: connection
    status = c_connect_with(c_string(target), timeout_s, c_string(options), connection%handle)
  end function pnl_connect_with

  integer function pnl_disconnect(connection) result(status)
    type(pnl_connection), intent(inout) :: connection
    status = c_disconnect(connection%handle)
    connection%handle = c_null_ptr
  end function pnl_disconnect

  !> Open a run from a "key=value; ..." spec (see penumbra_link.h for the keys).
  integer function pnl_open_run(connection, spec, run) result(status)
    type(pnl_connection), intent(in) :: connection
    character(len=*), intent(in) :: spec
    type(pnl_run), intent(out) :: run
    status = c_open_run(connection%handle, c_string(spec), run%handle)
  end function pnl_open_run

  integer function pnl_attach_run(connection, run_id, run) result(status)
    type(pnl_connection), intent(in) :: connection
    character(len=*), intent(in) :: run_id
    type(pnl_run), intent(out) :: run
    status = c_attach_run(connection%handle, c_string(run_id), run%handle)
  end function pnl_attach_run

  !> Attach holding the run's writer token (from pnl_writer_token on the rank that opened it).
  integer function pnl_attach_run_with_token(connection, run_id, writer_token, run) result(status)
    type(pnl_connection), intent(in) :: connection
    character(len=*), intent(in) :: run_id, writer_token
    type(pnl_run), intent(out) :: run
    status = c_attach_run_with_token(connection%handle, c_string(run_id), c_string(writer_token), run%handle)
  end function pnl_attach_run_with_token

  !> The run's writer token ("" and PNL_PENDING while the run is not open yet). A secret.
  integer function pnl_writer_token(run, token) result(status)
    type(pnl_run), intent(in) :: run
    character(len=*), intent(out) :: token
    character(kind=c_char) :: buf(PNL_WRITER_TOKEN_CAPACITY)
    status = c_writer_token(run%handle, buf, int(PNL_WRITER_TOKEN_CAPACITY, c_int))
    token = ""
    if (status == PNL_OK) token = pnl_label(buf)
  end function pnl_writer_token

  !> State of the handle's link (PNL_RUN_PENDING, ...) and its slice counts; never waits.
  integer function pnl_link_stats(run, report) result(status)
    type(pnl_run), intent(in) :: run
    type(pnl_link_report), intent(out) :: report
    status = c_link_stats(run%handle, report)
  end function pnl_link_stats

  !> The run's id ("" and PNL_PENDING while a run being opened is not open yet).
  integer function pnl_run_id(run, run_id) result(status)
    type(pnl_run), intent(in) :: run
    character(len=*), intent(out) :: run_id
    character(kind=c_char) :: buf(PNL_RUN_ID_CAPACITY)
    status = c_run_id(run%handle, buf, int(PNL_RUN_ID_CAPACITY, c_int))
    run_id = ""
    if (status == PNL_OK) run_id = pnl_label(buf)
  end function pnl_run_id

  !> Send what is queued, close the run on the server if asked, free the handle (always).
  integer function pnl_run_close(run, close_on_server, timeout_s) result(status)
    type(pnl_run), intent(inout) :: run
    logical, intent(in) :: close_on_server
    real(c_double), intent(in) :: timeout_s
    status = c_run_close(run%handle, merge(1_c_int, 0_c_int, close_on_server), timeout_s)
    run%handle = c_null_ptr
  end function pnl_run_close

  !> Submit this rank's patches of one iteration (fields in Fortran order; no copy by the caller).
  integer function pnl_submit(run, time, iteration, rank, nranks, patches) result(status)
    type(pnl_run), intent(in) :: run
    real(c_double), intent(in) :: time
    integer, intent(in) :: iteration, rank, nranks
    type(pnl_fortran_patch), intent(in) :: patches(:)
    type(pnl_c_patch), allocatable, target :: c_patches(:)
    type(names_buffer), allocatable, target :: names(:)
    type(c_ptr), allocatable, target :: pointers(:, :)
    integer :: i, fields
    fields = 1
    do i = 1, size(patches)
       if (allocated(patches(i)%field_data)) fields = max(fields, size(patches(i)%field_data))
    end do
    allocate(c_patches(max(1, size(patches))), names(size(patches)), pointers(fields, max(1, size(patches))))
    pointers = c_null_ptr
    do i = 1, size(patches)
       c_patches(i)%field_names = c_null_ptr
       c_patches(i)%field_data = c_null_ptr
       c_patches(i)%field_count = 0
       if (allocated(patches(i)%field_names)) then
          names(i)%text = c_string(patches(i)%field_names)
          c_patches(i)%field_names = c_loc(names(i)%text)
       end if
       if (allocated(patches(i)%field_data)) then
          c_patches(i)%field_count = int(size(patches(i)%field_data), c_int)
          pointers(1:size(patches(i)%field_data), i) = patches(i)%field_data
          c_patches(i)%field_data = c_loc(pointers(1, i))
       end if
       c_patches(i)%shape = int(patches(i)%shape, c_int)
       c_patches(i)%spacing = patches(i)%spacing
       c_patches(i)%origin = patches(i)%origin
       c_patches(i)%level = int(patches(i)%level, c_int)
       c_patches(i)%memory_order = PNL_ORDER_FORTRAN
    end do
    status = c_submit(run%handle, time, int(iteration, c_long_long), int(rank, c_int), int(nranks, c_int), &
         c_loc(c_patches(1)), int(size(patches), c_int))
  end function pnl_submit

  integer function pnl_flush(run, timeout_s) result(status)
    type(pnl_run), intent(in) :: run
    real(c_double), intent(in) :: timeout_s
    status = c_flush(run%handle, timeout_s)
  end function pnl_flush

  integer function pnl_wait_surfaces(run, iteration, timeout_s) result(status)
    type(pnl_run), intent(in) :: run
    integer, intent(in) :: iteration
    real(c_double), intent(in) :: timeout_s
    status = c_wait_surfaces(run%handle, int(iteration, c_long_long), timeout_s)
  end function pnl_wait_surfaces

  !> Latest state of every surface into surfaces(1:min(size, count)); count = how many exist.
  integer function pnl_latest_surfaces(run, refresh, surfaces, count) result(status)
    type(pnl_run), intent(in) :: run
    logical, intent(in) :: refresh
    type(pnl_surface), intent(inout) :: surfaces(:)
    integer, intent(out) :: count
    integer(c_int) :: n
    status = c_latest_surfaces(run%handle, merge(1_c_int, 0_c_int, refresh), surfaces, int(size(surfaces), c_int), n)
    count = n
  end function pnl_latest_surfaces

  !> Latest guidance; bodies(1:min(size, info%body_count)) filled. PNL_NOT_FOUND before any.
  integer function pnl_latest_guidance(run, refresh, info, bodies) result(status)
    type(pnl_run), intent(in) :: run
    logical, intent(in) :: refresh
    type(pnl_guidance_info), intent(out) :: info
    type(pnl_body_guidance), intent(inout) :: bodies(:)
    status = c_latest_guidance(run%handle, merge(1_c_int, 0_c_int, refresh), info, bodies, int(size(bodies), c_int))
  end function pnl_latest_guidance

  !> This thread's last error message.
  function pnl_last_error() result(message)
    character(len=:), allocatable :: message
    character(kind=c_char) :: buf(4096)
    integer(c_int) :: n
    n = c_last_error_copy(buf, int(size(buf), c_int))
    message = pnl_label(buf)
  end function pnl_last_error

  function pnl_status_name(status) result(name)
    integer, intent(in) :: status
    character(len=:), allocatable :: name
    character(kind=c_char), pointer :: chars(:)
    type(c_ptr) :: text
    text = c_status_name(int(status, c_int))
    call c_f_pointer(text, chars, [int(c_strlen(text))])
    name = pnl_label(chars)
  end function pnl_status_name

end module penumbra_link
