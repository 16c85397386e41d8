! bl_pair_evolution.f90 -- a stand-in Fortran evolution code that uses Penumbra through the
! penumbra_link module: Brill-Lindquist data for two punctures on two refinement levels (a
! coarse box around the pair, a fine box around each hole), a few slices while the punctures
! drift a little, then the horizons and the refinement guidance read back. Fields are Fortran
! arrays u(nx, ny, nz) handed over with c_loc (no copy on this side).
!
!   bl_pair_evolution_f [HOST:PORT]        (default: $PENUMBRA_SERVER)
!
! Data (G = c = 1, lengths in M): gamma_ij = psi^4 delta_ij, K_ij = 0,
! psi = 1 + m1 / (2 r1) + m2 / (2 r2); m1 = m2 = 0.5 at x = +-1.5, so each horizon has a
! coordinate radius of about m_i / 2 = 0.25 and the fine spacing 0.035 puts ~13 points across.
! Exit status 0 only if both individual horizons were found in the last slice.
program bl_pair_evolution
  use, intrinsic :: iso_c_binding
  use, intrinsic :: iso_fortran_env, only: int64
  use penumbra_link
  implicit none

  integer, parameter :: slices = 6, nfields = 12, holes = 2
  real(c_double), parameter :: masses(holes) = [0.5d0, 0.5d0]
  character(len=1), parameter :: labels(holes) = ["A", "B"]
  character(len=*), parameter :: field_names = &
       "gamma_xx,gamma_xy,gamma_xz,gamma_yy,gamma_yz,gamma_zz,K_xx,K_xy,K_xz,K_yy,K_yz,K_zz"

  type :: box
     real(c_double), allocatable :: psi4(:, :, :), zeros(:, :, :)
     real(c_double) :: origin(3), spacing
     integer :: level
  end type box

  type(box), target :: boxes(3)
  type(pnl_fortran_patch) :: patches(3)
  type(pnl_connection) :: connection
  type(pnl_run) :: run
  type(pnl_surface) :: surfaces(8)
  type(pnl_guidance_info) :: info
  type(pnl_link_report) :: link
  type(pnl_body_guidance) :: guided(holes)
  character(len=256) :: target
  character(len=1024) :: options
  character(len=512) :: spec
  character(len=PNL_RUN_ID_CAPACITY) :: run_id
  real(c_double) :: a(3), b(3), give_up, blocked(slices)
  integer :: status, n, p, s, h, count, found, last
  integer(int64) :: t0, t1, rate

  if (command_argument_count() >= 1) then
     call get_command_argument(1, target)
  else
     call get_environment_variable("PENUMBRA_SERVER", target)
  end if
  if (len_trim(target) == 0) then
     write (0, '(a)') "usage: bl_pair_evolution_f HOST:PORT (or set PENUMBRA_SERVER)"
     stop 1
  end if

  call make_box(boxes(1), [0d0, 0d0, 0d0], [69, 25, 25], 0.07d0, 0)
  call puncture(1, 0, a)
  call puncture(2, 0, b)
  call make_box(boxes(2), [a(1), 0d0, 0d0], [35, 35, 35], 0.035d0, 1)
  call make_box(boxes(3), [b(1), 0d0, 0d0], [35, 35, 35], 0.035d0, 1)
  do p = 1, 3
     patches(p)%field_names = field_names
     allocate(patches(p)%field_data(nfields))
     ! gamma_xx, gamma_yy, gamma_zz = psi^4; every other component vanishes (one shared buffer).
     patches(p)%field_data = c_loc(boxes(p)%zeros)
     patches(p)%field_data([1, 4, 6]) = c_loc(boxes(p)%psi4)
     patches(p)%shape = shape(boxes(p)%psi4)
     patches(p)%spacing = boxes(p)%spacing
     patches(p)%origin = boxes(p)%origin
     patches(p)%level = boxes(p)%level
  end do

  ! TLS and tokens, if the server wants them: e.g. PENUMBRA_LINK_OPTIONS="tls_ca=server.crt;
  ! token_file=opener.token" (see pnl_connect_with in penumbra_link.h).
  call get_environment_variable("PENUMBRA_LINK_OPTIONS", options)
  status = pnl_connect_with(trim(target), 20d0, trim(options), connection)
  call check("pnl_connect", status)   ! PNL_PENDING is no failure: the connection keeps trying
  write (spec, '(a, i0, a, 2(a, "=", a, ",", 3(g0, ","), g0, ";"))') &
       "variable_set=adm; name=Brill-Lindquist pair (Fortran example); lmax=8; queue_depth=", slices, ";", &
       "body", labels(1), a, masses(1), "body", labels(2), b, masses(2)
  status = pnl_open_run(connection, trim(spec), run)
  call check("pnl_open_run", status)  ! pending: slices queue (keep newest) until the run opens

  call system_clock(count_rate=rate)
  do n = 0, slices - 1
     do p = 1, 3
        call fill_box(boxes(p), n)   ! the same arrays every slice: pnl_submit copied the last one
     end do
     call system_clock(t0)
     status = pnl_submit(run, 0.25d0 * n, n, 0, 1, patches)
     call system_clock(t1)
     blocked(n + 1) = real(t1 - t0, c_double) / rate
     call check("pnl_submit", status)
     write (*, '(a, i0, a, f0.2, a)') "submitted iteration ", n, ": the call blocked ", 1d3 * blocked(n + 1), " ms"
  end do
  write (*, '(a, f0.2, a)') "submit blocking: max ", 1d3 * maxval(blocked), " ms"

  last = slices - 1
  call check("pnl_flush", pnl_flush(run, 300d0))
  ! Flushed, so the run is open and has its id (keep it to attach again after a restart).
  status = pnl_run_id(run, run_id)
  call check("pnl_run_id", status)
  write (*, '(2a)') "run_id: ", trim(run_id)
  call check("pnl_link_stats", pnl_link_stats(run, link))
  write (*, '(a, 4(i0, a))') "link: ", link%submitted, " submitted, ", link%sent, " sent, ", link%dropped, &
       " dropped locally, ", link%refused, " refused"
  call check("pnl_wait_surfaces", pnl_wait_surfaces(run, last, 600d0))
  status = pnl_latest_surfaces(run, .true., surfaces, count)
  call check("pnl_latest_surfaces", status)
  found = 0
  do s = 1, min(count, size(surfaces))
     associate (f => surfaces(s))
       write (*, '(3a, i0, a, f9.5, a, f7.5, a, 3(f8.4, 1x), a)') "surface ", pnl_label(f%label), &
            ": found at iteration ", f%found_iteration, ": area ", f%area, " M^2, irreducible mass ", &
            f%irreducible_mass, " M, centroid ", f%centroid, "M"
       do h = 1, holes
          if (pnl_label(f%label) == labels(h) .and. f%latest_attempt_found == 1 .and. f%found_iteration == last) &
               found = found + 1
       end do
     end associate
  end do

  ! The guidance for the last slice follows its surfaces: poll the cache with a deadline.
  give_up = now_s() + 120d0
  do
     status = pnl_latest_guidance(run, .false., info, guided)
     if (status == PNL_OK) then
        if (info%iteration >= last) exit
     else if (status /= PNL_NOT_FOUND) then
        exit
     end if
     if (now_s() > give_up) exit
     call pause_briefly()
  end do
  call check("pnl_latest_guidance", status)
  do h = 1, min(info%body_count, holes)
     write (*, '(3a, 3(f8.4, 1x), a, i0, a, f8.4, a)') "guidance body ", pnl_label(guided(h)%label), ": centre ", &
          guided(h)%centre, "finest level ", guided(h)%finest_level, " spacing ", guided(h)%finest_spacing, " M"
  end do

  call check("pnl_run_close", pnl_run_close(run, .true., 300d0))
  call check("pnl_disconnect", pnl_disconnect(connection))
  if (found /= holes) then
     write (0, '(a, i0, a, i0, a, i0, a)') "bl_pair_evolution_f: FAILED: ", found, " of the ", holes, &
          " horizons were found in the last slice (iteration ", last, ")"
     stop 3
  end if
  write (*, '(a)') "both horizons found in the last slice"

contains

  subroutine check(what, status)
    character(len=*), intent(in) :: what
    integer, intent(in) :: status
    if (pnl_failed(status)) then
       write (0, '(5a)') "bl_pair_evolution_f: ", what, " failed: ", pnl_status_name(status), ": " // pnl_last_error()
       stop 2
    else if (status == PNL_PENDING) then
       write (*, '(2a)') what, ": " // pnl_last_error()
    end if
  end subroutine check

  !> Puncture position at slice n: drifting inwards, never on a grid node (y, z offsets).
  subroutine puncture(hole, n, x)
    integer, intent(in) :: hole, n
    real(c_double), intent(out) :: x(3)
    x = [merge(1d0, -1d0, hole == 1) * (1.5d0 - 0.02d0 * n), 0.011d0 + 0.002d0 * n, 0.017d0]
  end subroutine puncture

  subroutine make_box(bx, centre, nodes, spacing, level)
    type(box), intent(inout) :: bx
    real(c_double), intent(in) :: centre(3), spacing
    integer, intent(in) :: nodes(3), level
    allocate(bx%psi4(nodes(1), nodes(2), nodes(3)), bx%zeros(nodes(1), nodes(2), nodes(3)))
    bx%zeros = 0
    bx%origin = centre - 0.5d0 * (nodes - 1) * spacing
    bx%spacing = spacing
    bx%level = level
  end subroutine make_box

  subroutine fill_box(bx, n)
    type(box), intent(inout) :: bx
    integer, intent(in) :: n
    real(c_double) :: x(3), p(3, holes), psi
    integer :: i, j, k, hh
    do hh = 1, holes
       call puncture(hh, n, p(:, hh))
    end do
    do k = 1, size(bx%psi4, 3)
       do j = 1, size(bx%psi4, 2)
          do i = 1, size(bx%psi4, 1)
             x = bx%origin + bx%spacing * [i - 1, j - 1, k - 1]
             psi = 1
             do hh = 1, holes
                psi = psi + masses(hh) / (2 * norm2(x - p(:, hh)))
             end do
             bx%psi4(i, j, k) = psi**4
          end do
       end do
    end do
  end subroutine fill_box

  real(c_double) function now_s()
    integer(int64) :: count, count_rate
    call system_clock(count, count_rate)
    now_s = real(count, c_double) / count_rate
  end function now_s

  subroutine pause_briefly()
    interface
       integer(c_int) function usleep(microseconds) bind(C, name="usleep")
         import :: c_int
         integer(c_int), value :: microseconds
       end function usleep
    end interface
    if (usleep(50000_c_int) /= 0) continue
  end subroutine pause_briefly

end program bl_pair_evolution
